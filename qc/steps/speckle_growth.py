"""Tables of the speckle step's area rule (see :func:`area_tables`; kernel ``_growth_kernels.keep_areas``)."""

from __future__ import annotations

import numpy as np

from .speckle_tests import min_count_table, positive_rate, tabulated_levels

__all__ = ["area_tables", "with_area_tables"]

def area_tables(levels: np.ndarray, rates, settings) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds of the area rule (kernel ``keep_areas``) per zone, ``(Z, 2R+2, 2R+2)`` each for
    the wide window of half-width ``R = wide_radius``: the smallest dim positive neighbour count
    kept in a window of ``a`` x ``b`` pixels, at ``area_alpha`` (the whole window) and at
    ``area_half_alpha`` (each of its four halves).

    Exact one-sided binomial tests (:func:`min_count_table`, the density test on a larger
    window). The whole window at ``area_alpha`` (1e-6, about ``value_alpha``) bounds the false
    keeps on background alone; asking each half too is an intersection-union test (Berger 1982),
    whose level is that of its strictest part, so it only makes the rule stricter: a background
    pixel beside a dim stain or a group of cells has a half of background and fails it. Shape
    ``(0, 0, 0)`` when off (``area_alpha`` or ``wide_radius`` 0).
    """
    radius = int(settings.wide_radius)
    if settings.area_alpha <= 0 or radius <= 0:
        empty = np.zeros((0, 0, 0), np.int32)
        return empty, empty
    rates = positive_rate(levels, settings.threshold) if rates is None else np.asarray(rates, np.float64)
    whole = min_count_table(radius, rates, settings.area_alpha)
    halves = min_count_table(radius, rates, settings.area_half_alpha)
    whole[rates >= 1.0] = 0  # a zone whose every pixel is positive: nothing is sparser than background
    halves[rates >= 1.0] = 0
    return np.ascontiguousarray(whole, np.int32), np.ascontiguousarray(halves, np.int32)


def with_area_tables(params: dict, settings, rate: float, zone=None) -> dict:
    """The speckle kernel's ``params`` (:func:`.speckle_tests.filter_parameters`) with the area
    rule's tables added (``area_min``, ``area_half_min``), for the same zone levels (or the channel's one ``rate``)."""
    levels = tabulated_levels(params["levels"], zone) if params["zoned"] else params["levels"]
    params["area_min"], params["area_half_min"] = area_tables(levels, None if params["zoned"] else np.array([rate]),
                                                              settings)
    return params
