"""Speckle: sparse background counts removed by a local-density test.

Speckle
    Isolated background counts are sparse and spatially independent; real signal is
    clustered. A positive pixel (``value > threshold``) is kept when

    * the number ``n`` of positive pixels among its ``(2r+1)^2 - 1`` neighbours is
      improbable for background: ``P(N >= n) < alpha`` with ``N ~ Binomial(m, p)``
      (a *core* pixel: the core-point rule of DBSCAN, Ester et al. 1996, on the pixel
      grid, with its count threshold derived from a false-keep rate), or
    * (only with ``keep_touching``) it touches a core pixel, 8-connected: DBSCAN's border
      points at distance 1. This keeps more of thin processes in high background, and
      more background beside cells; it is off by default, where background counts in
      the rims of cells weigh more, or
    * its own value is improbable for background: ``P(Y >= value) < value_alpha`` with
      ``Y ~ Poisson(level)``, so bright tiny objects survive.

    * (line test, ``line_half``) the dim counts on a line through it are improbable for
      background, each half's too, and the line is denser than its flanks; then, in
      ``line_extend`` rounds, a dropped dim pixel whose own count passes the side test, with
      one or two kept neighbours, is kept when a line through it continues a kept neighbour and
      passes the same tests with the side test asked of that half alone: a fibre's end; and a
      dropped dim pixel whose wide window and each half of it are dense (``area_alpha``) is kept.

    * (chain rule, ``chain_alpha``) last, a group of 2 to ``chain_max`` dropped positive pixels
      (8-connected) touching at most ``chain_contacts`` kept pixels is kept when its summed
      whole counts are improbable for background plus the spillover compensation removed there
      (exact tail of a sum of zero-truncated Poisson counts, David & Johnson 1952, Tate & Goen
      1958; :mod:`.speckle_chains`): a dim fibre that bends, in low background.

    Then kept pixels are grouped into 8-connected components and components smaller than
    ``min_area`` are dropped, unless one of their pixels is so bright that background
    cannot explain it anywhere in the ROI: ``P(Y >= value) < lone_alpha`` under
    ``Poisson(level)`` at the channel's densest background level, with ``lone_alpha = 1e-12`` about ``value_alpha`` spread over a
    million pixels (a Bonferroni bound on one false keep per ROI). So the default
    ``min_area = 2`` removes a single isolated count of two or three while a one-pixel
    speck of real stain (ten counts or more on a background of 0.1) stays; hot pixels are
    the hot-pixel step's, which runs first. Dropped pixels are set to 0; pixels at or below
    ``threshold`` are left as they are.

Background
    ``p`` (the background positive rate) and ``level`` (the background mean) are estimated
    once per channel by :func:`estimate_background`. Under background alone the centre of
    a window is positive with probability ``p`` whatever its neighbours are, so among
    windows with ``n`` positive neighbours the fraction of positive centres estimates ``p``
    for every ``n`` (the conditional maximum likelihood). Only windows with few positive
    neighbours (``n`` up to the median of ``Binomial(m, p)``, iterated to a fixed point
    from the 1 % quantile of all ``n``) are used: a window centred in a cell has many
    positive neighbours and does not enter, and a window that merely grazes a cell has a
    background centre and so does not bias the estimate. Only windows wholly inside the
    image count. ``level`` follows from ``p`` under a Poisson background:
    ``P(Y > threshold) = p``, i.e. ``level = -log(1 - p)`` for ``threshold = 0``.

Chunked stacks
    The background estimate is a property of the whole channel: for dask input it is
    computed first (one pass over the channel), then the filter runs block by block with
    ``dask.array.map_overlap``, ``boundary='none'`` (the kernels treat the image edge
    themselves, exactly as for numpy) and the depth from :func:`speckle_depth`, which
    makes every block's result identical to the whole-image result. Window counts are
    exact ``radius`` pixels in from the block edge, kept marks ``radius + 1`` in (the
    ``keep_touching`` rule looks one pixel further).
    A kept component smaller than ``min_area`` spans fewer than ``min_area`` pixels, so
    seen from the block's own part it cannot leave a margin of ``min_area - 1`` pixels;
    if the part seen in the block does leave that margin, the component has at least
    ``min_area`` pixels anyway. Hence ``depth = radius + 1 + (min_area - 1) = radius +
    min_area``.

References
----------
.. [1] M. Ester, H.-P. Kriegel, J. Sander and X. Xu, "A density-based algorithm for
   discovering clusters in large spatial databases with noise", Proc. KDD-96, 226-231.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
from plexwash.qc.steps import _growth_kernels as _g  # absolute: one numba cache
from plexwash.qc.steps import _kernels as _k  # absolute: one numba cache, whatever imported us

from .._arrays import as_channel, as_stack, is_dask
from ..background_context import PARTS, ZONES_PER_PART, zone_factors
from ..errors import InputError
from ..settings import build_settings
from .lifting import (
    StepResult,
    kernel_outputs,
    lift_channel,
    per_channel_settings,
    removed_fraction,
    run_stack,
)
from .speckle_chains import with_chain_tables
from .speckle_counts import (
    centre_histogram,
    centre_histogram_dask,
    check_window,
    region_histogram,
    window_counts,
)
from .speckle_growth import with_area_tables
from .speckle_settings import SpeckleSettings, speckle_depth
from .speckle_tests import (
    MIN_REGION_WINDOWS,
    binomial_min_count,
    fit_rate,
    line_offsets,
    poisson_level,
    poisson_min_value,
    without_residue,
)
from .speckle_tests import (
    filter_parameters as table_parameters,
)

__all__ = [
    "BackgroundEstimate",
    "SpeckleSettings",
    "estimate_background",
    "remove_speckle",
    "speckle_depth",
    "speckle_stack",
]


class BackgroundEstimate(NamedTuple):
    """Background of one channel, as the speckle filter sees it.

    Attributes
    ----------
    rate : float
        ``p``, the probability that a background pixel is positive.
    level : float
        ``lambda``, the background mean of a Poisson model with ``P(Y > threshold) = p``.
    count_threshold : int
        Smallest positive-neighbour count kept by the density test in a full window
        (``(2r+1)^2`` if none can be).
    value_threshold : float
        Smallest whole count kept by the value test (values above ``value_threshold - 1``
        are kept; ``inf`` when none are).
    threshold, radius, alpha, value_alpha
        The settings the estimate was made with.
    glass_level : float
        With a background context, the background mean on glass (NaN without glass or
        without a context); ``rate`` and ``level`` are then those of the tissue.
    zone_levels : numpy.ndarray or None
        With a background context, the background mean of every zone code (see
        :class:`plexwash.qc.background_context.BackgroundContext`); None: ``level`` everywhere.
    """

    rate: float
    level: float
    count_threshold: int
    value_threshold: float
    threshold: float
    radius: int
    alpha: float
    value_alpha: float
    glass_level: float = float("nan")
    zone_levels: np.ndarray | None = None


# ----------------------------------------------------------------------------- background


#: The line test turned off (``line_half = 0``): no lines to look along.
_NO_LINES = np.zeros((0, 0, 2), np.int64)

def estimate_background(
    image,
    *,
    threshold: float = 0.5,
    radius: int = 2,
    alpha: float = 0.01,
    value_alpha: float = 1e-6,
) -> BackgroundEstimate:
    """Estimate a channel's background positive rate and level, robustly to cells.

    On background a window's centre is positive with probability ``p`` independently of
    its ``n`` positive neighbours. ``p`` is the fraction of positive centres among full
    windows with ``n <= K``, ``K`` the median of ``Binomial((2r+1)^2 - 1, p)``, iterated to
    a fixed point from the 1 % quantile of all ``n``: windows centred in cells have large
    ``n`` and stay out, windows grazing a cell have background centres and do not bias it.
    The background level follows from a Poisson model: ``P(Y > threshold) = p``.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel, at least ``2 * radius + 1`` pixels a side. For dask input the
        neighbour-count histogram is computed here (one pass).
    threshold : float, optional
        A pixel is positive when its value is above this (>= 0). The default 0.5 is "at
        least one count" for count data and ignores the tiny positive residue that
        compensation leaves in pixels without counts (which would otherwise inflate ``p``).
    radius : int, optional
        Window half-width.
    alpha, value_alpha : float, optional
        False-keep rates of the density and value tests, used for the thresholds
        reported in the estimate.

    Returns
    -------
    BackgroundEstimate

    References
    ----------
    .. [1] M. Ester et al., Proc. KDD-96 (the core-point rule that the thresholds serve).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> img = rng.poisson(0.2, (400, 400)).astype(np.float32)  # P(Y > 0) = 0.181
    >>> bg = estimate_background(img)
    >>> round(bg.rate, 2), round(bg.level, 1), bg.count_threshold, bg.value_threshold
    (0.18, 0.2, 10, 6.0)
    """
    settings = build_settings(SpeckleSettings, {"threshold": threshold, "radius": radius, "alpha": alpha,
                                                "value_alpha": value_alpha}, section="speckle")
    if is_dask(image):
        histogram = np.asarray(centre_histogram_dask(as_channel(image), settings.threshold, settings.radius).compute())
    else:
        image = as_channel(image)
        check_window(image.shape, settings.radius)
        counts = _counts(image, settings)
        histogram = centre_histogram(image, counts, settings.threshold, settings.radius)
    return _background_from_histogram(histogram, settings)


def _counts(image: np.ndarray, settings: SpeckleSettings) -> np.ndarray:
    return window_counts(image, settings.threshold, settings.radius)


def _background_from_histogram(histogram: np.ndarray | None, settings: SpeckleSettings, *,
                               rate: float | None = None) -> BackgroundEstimate:
    """The estimate from a centre histogram (or from a ``rate`` already fitted)."""
    window = (2 * int(settings.radius) + 1) ** 2
    rate = fit_rate(histogram) if rate is None else rate
    level = poisson_level(rate, settings.threshold)
    count_threshold = int(binomial_min_count(np.array([window - 1]), rate, settings.alpha)[0])
    return BackgroundEstimate(
        rate=rate,
        level=level,
        count_threshold=count_threshold,
        value_threshold=poisson_min_value(level, settings.value_alpha),
        threshold=float(settings.threshold),
        radius=int(settings.radius),
        alpha=float(settings.alpha),
        value_alpha=float(settings.value_alpha),
    )


# ----------------------------------------------------------------------------- speckle


def remove_speckle(
    image,
    *,
    threshold: float = 0.5,
    radius: int = 2,
    alpha: float = 0.01,
    value_alpha: float = 1e-6,
    keep_touching: bool = False,
    min_area: int = 2,
    wide_radius: int = 5,
    support_alpha: float = 0.2,
    edge_alpha: float = 1e-3,
    lone_alpha: float = 1e-12,
    line_half: int = 4,
    line_alpha: float = 0.003,
    line_side_alpha: float = 0.05,
    line_max_level: float = 1.0,
    flank_alpha: float = 0.01,
    flank_distance: int = 2,
    line_extend: int = 2,
    area_alpha: float = 1e-6,
    area_half_alpha: float = 0.01,
    rim_alpha: float = 0.01,
    chain_alpha: float = 1e-4,
    chain_max: int = 16,
    chain_contacts: int = 6,
    background: BackgroundEstimate | None = None,
) -> StepResult:
    """Remove sparse background counts of one channel by a local-density test.

    A positive pixel (``value > threshold``) is kept when its positive-neighbour count
    ``n`` in the ``(2r+1)^2`` window is improbable for background (``P(N >= n) < alpha``,
    ``N ~ Binomial(m, p)``, ``m`` = neighbours inside the image), when its value is
    improbable for background (``P(Y >= value) < value_alpha``, ``Y ~ Poisson(level)``),
    or, with ``keep_touching``, when it touches a pixel kept by density. Kept 8-connected
    components smaller than ``min_area`` are dropped; bright single pixels too, so an
    isolated hot-ish count goes while a speck of two or more pixels stays. Dropped pixels
    become 0; pixels at or below ``threshold`` are left as they are.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel, at least ``2 * radius + 1`` pixels a side. Not modified. For dask
        input without ``background`` the estimate is computed here (one pass), then the
        filter stays lazy.
    threshold : float, optional
        A pixel is positive when its value is above this (compared in float32); 0.5 means
        "at least one count" and ignores sub-count residue left by compensation.
    radius : int, optional
        Window half-width; the cost does not depend on it (running box sums).
    alpha : float, optional
        False-keep rate of the density test for one background pixel.
    value_alpha : float, optional
        False-keep rate of the value test for one background pixel.
    keep_touching : bool, optional
        Also keep positive pixels touching a pixel kept by density (DBSCAN's border
        points): more of thin processes in high background, and more background counts
        beside cells.
    min_area : int, optional
        Smallest kept component, in pixels (1: no size rule).
    line_half : int, optional
        A pixel is also dense when, on a line of ``2 * line_half`` pixels through it (16
        orientations and their phases), the summed counts of its dim positive pixels are
        improbably high for background (Poisson test at ``line_alpha / T`` for ``T`` lines,
        Bonferroni; 0: off), each half's on its own too (``line_side_alpha``), and the line is
        denser than each parallel line ``flank_distance`` pixels across it (``flank_alpha``).
    line_alpha : float, optional
        False-keep rate of the line test for one background pixel.
    line_side_alpha : float, optional
        Poisson test each half of the line must pass on its own (1: off).
    line_max_level : float, optional
        The line test is asked only where the background level is at most this (counts per
        pixel): on denser backgrounds the square windows alone judge.
    line_extend, area_alpha, area_half_alpha : optional
        The line-end rule's rounds and the area rule's levels (0: off; see the module notes).
    flank_alpha, flank_distance : optional
        The line's counts against each flank's: conditional test of two Poisson means
        (Przyborowski & Wilenski 1940) at ``flank_alpha`` (0: off).
    rim_alpha : float, optional
        Rim rule: a pixel dense in its own window beside a bright cell is judged on its other
        neighbours alone (exact binomial test at ``rim_alpha``; 0: off).
    chain_alpha, chain_max, chain_contacts : optional
        The chain rule's level and group limits (0: off; see the module notes and
        :mod:`.speckle_chains`).
    lone_alpha : float, optional
        A smaller component stays when one of its pixels has ``P(Y >= value) < lone_alpha``
        under the channel's densest Poisson background (0: off).
    wide_radius, support_alpha : optional
        A pixel is also dense when its ``(2R+1)^2`` window holds improbably many dim
        positive neighbours (binomial test at ``alpha``; dim: not above the value test's
        cut) and its own window at least ``P(N >= n) < support_alpha`` (``wide_radius=0``:
        off).
    edge_alpha : float, optional
        A dense pixel whose value is this improbably low for the mean of its 8 neighbours
        (lower Poisson tail) is not kept by density (0: off; see :mod:`.speckle_tests`).
    background : BackgroundEstimate, optional
        Use this estimate (e.g. made once on a whole channel) instead of estimating
        from ``image``. Its ``threshold`` must equal ``threshold``.

    Returns
    -------
    StepResult
        ``stats``: ``rate``, ``level``, ``count_threshold`` (smallest kept neighbour
        count in a full window), ``value_threshold`` (smallest whole count kept by
        value), ``n_removed`` (pixels set to 0), ``removed_fraction``.

    References
    ----------
    .. [1] M. Ester, H.-P. Kriegel, J. Sander and X. Xu, Proc. KDD-96, 226-231.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((40, 40), np.float32)
    >>> img[5, 5] = 1.0                  # an isolated count
    >>> img[20:26, 20:26] = 2.0          # a small cell
    >>> out, removed, st = remove_speckle(img)
    >>> float(out[5, 5]), float(out[22, 22]), st["n_removed"]
    (0.0, 2.0, 1)
    """
    values = {"threshold": threshold, "radius": radius, "alpha": alpha, "value_alpha": value_alpha,
              "keep_touching": keep_touching, "min_area": min_area, "edge_alpha": edge_alpha,
              "wide_radius": wide_radius, "support_alpha": support_alpha, "lone_alpha": lone_alpha,
              "line_half": line_half, "line_alpha": line_alpha, "line_side_alpha": line_side_alpha,
              "line_max_level": line_max_level, "flank_alpha": flank_alpha, "flank_distance": flank_distance, "rim_alpha": rim_alpha,
              "line_extend": line_extend, "area_alpha": area_alpha, "area_half_alpha": area_half_alpha,
              "chain_alpha": chain_alpha, "chain_max": chain_max, "chain_contacts": chain_contacts}
    settings = build_settings(SpeckleSettings, values, section="speckle")
    if background is not None and float(background.threshold) != float(settings.threshold):
        raise InputError(
            "background", f"estimated with threshold {background.threshold:g}, filter uses {settings.threshold:g}"
        )
    image = as_channel(image)
    check_window(image.shape, settings.radius)
    if is_dask(image):
        if background is None:
            histogram = centre_histogram_dask(image, settings.threshold, settings.radius).compute()
            background = _background_from_histogram(np.asarray(histogram), settings)
        return _speckle_dask(image, settings, background)
    return _speckle_numpy(image, settings, background)


def _speckle_numpy(image: np.ndarray, settings: SpeckleSettings, background, out=None, removed=None,
                   zone=None, spilled=None) -> StepResult:
    counts = _counts(image, settings)
    if background is None:
        background = _estimate(image, counts, settings, zone)
    params = filter_parameters(settings, background, zone)
    tested = without_residue(image, spilled, zone if params["zoned"] else None, params["levels"],
                             settings.residue_alpha)
    if tested is not image:
        counts = _counts(tested, settings)
    out, removed = kernel_outputs(image, out, removed)
    _speckle_apply(tested, counts, zone, params, out, removed, spilled)
    if tested is not image:
        np.subtract(image, out, out=removed)
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=int(np.count_nonzero(removed > 0)), removed_fraction=removed_fraction(removed, image))
    return StepResult(out, removed, stats)


def _estimate(image: np.ndarray, counts: np.ndarray, settings: SpeckleSettings, zone) -> BackgroundEstimate:
    """The channel's background: per region of the context's zones, or one for the whole channel."""
    if zone is None or not settings.local_rates:
        return _background_from_histogram(centre_histogram(image, counts, settings.threshold, settings.radius), settings)
    return _regional_background(region_histogram(image, counts, settings.threshold, settings.radius, zone), settings)


def _regional_background(histogram: np.ndarray, settings: SpeckleSettings) -> BackgroundEstimate:
    """The background of each region (glass, tissue) fitted on its own windows.

    A region's rate is fitted on the windows centred away from the tissue edge (parts 0 and
    3), or on all its windows when those are fewer than ``MIN_REGION_WINDOWS``; a region
    with fewer windows still takes the fit of all windows. Each zone's level is its
    region's level times the zone's shared variation.
    """
    rates = []
    for inner, edge in ((0, 1), (3, 2)):
        chosen = histogram[inner]
        if chosen.sum() < MIN_REGION_WINDOWS:
            chosen = histogram[inner] + histogram[edge]
        if chosen.sum() < MIN_REGION_WINDOWS:
            chosen = histogram.sum(axis=0)
        rates.append(fit_rate(chosen, lowest=1))
    levels = [poisson_level(rate, settings.threshold) for rate in rates]
    part = np.arange(len(PARTS) * ZONES_PER_PART) // ZONES_PER_PART
    with np.errstate(invalid="ignore"):  # an infinite level stays infinite
        zone_levels = np.where(part < 2, levels[0], levels[1]) * zone_factors()
    base = _background_from_histogram(None, settings, rate=rates[1])
    has_glass = histogram[:2].sum() >= MIN_REGION_WINDOWS
    return base._replace(glass_level=float(levels[0] if has_glass else np.nan), zone_levels=zone_levels)


def filter_parameters(settings: SpeckleSettings, background: BackgroundEstimate, zone=None) -> dict:
    """:func:`.speckle_tests.filter_parameters` with the area rule's tables (``area_min``,
    ``area_half_min``)."""
    return with_chain_tables(with_area_tables(table_parameters(settings, background, zone), settings,
                                              background.rate, zone), settings)


def _speckle_apply(image, counts, zone, params: dict, out, removed, spilled=None) -> int:
    if params["pass_through"]:  # every window is full: no pixel is sparser than background
        out[...] = image
        removed[...] = 0.0
        return 0
    if not params["zoned"] or zone is None:
        zone = np.zeros(image.shape, np.uint8)
    wide = counts
    if params["wide_radius"] > 0:
        wide = np.empty(image.shape, np.uint16)
        _k.window_counts(image, params["threshold"], params["wide_radius"], wide, params["wide_upper"])
    zone = np.ascontiguousarray(zone, np.uint8)
    lines = line_offsets(params["line_half"]) if params["line_half"] > 0 else _NO_LINES
    skip = ("pass_through", "zoned", "wide_upper", "levels", "line_half", "line_extend", "area_min", "area_half_min",
            "chain_grid", "chain_min", "chain_max", "chain_contacts", "chain_alpha", "chain_lowest")
    kernel_args = {k: v for k, v in params.items() if k not in skip}
    n_removed = _k.speckle_filter(image, counts, wide, lines, params["wide_upper"], zone=zone, out=out,
                                  removed=removed, **kernel_args)
    if params["line_extend"] > 0 and lines.shape[0] > 0:
        n_removed -= _g.extend_lines(image, out, removed, params["threshold"], params["wide_upper"], lines, zone,
                                     params["line_min_count"], params["line_flank"], params["line_flank_min"],
                                     params["line_extend"])
    if params["wide_radius"] > 0:
        n_removed -= _g.keep_areas(image, wide, out, removed, params["threshold"], params["wide_upper"], zone,
                                   params["wide_radius"], params["area_min"], params["area_half_min"])
    if params["chain_min"].shape[0] > 0:  # the chain rule, against background plus removed spillover
        ghost = np.zeros(image.shape, np.float32) if spilled is None else np.ascontiguousarray(spilled, np.float32)
        n_removed -= _g.keep_chains(image, out, removed, params["threshold"], zone, params["levels"], ghost,
                                    params["chain_grid"], params["chain_min"], params["chain_max"],
                                    params["chain_contacts"], params["chain_alpha"], params["chain_lowest"])
    return n_removed


def _speckle_block(block, zone=None, spilled=None, *, params: dict, settings: SpeckleSettings | None = None):
    block = np.ascontiguousarray(block)
    if spilled is not None and settings is not None:
        block = without_residue(block, np.ascontiguousarray(spilled), zone if params["zoned"] else None,
                                params["levels"], settings.residue_alpha)
    counts = np.empty(block.shape, np.uint16)
    _k.window_counts(block, params["threshold"], params["radius"], counts)
    out = np.empty(block.shape, np.float32)
    _speckle_apply(block, counts, zone, params, out, np.empty_like(out), spilled if settings is not None else None)
    return out


def _speckle_dask(image, settings: SpeckleSettings, background: BackgroundEstimate) -> StepResult:
    out = lift_channel(image, _speckle_block, speckle_depth(settings),
                       params=filter_parameters(settings, background))
    removed = image - out
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=(removed > 0).sum(), removed_fraction=removed_fraction(removed, image))
    return StepResult(out, removed, stats)


def _speckle_stats(settings: SpeckleSettings, background: BackgroundEstimate) -> dict:
    window = (2 * int(settings.radius) + 1) ** 2
    return {
        "rate": float(background.rate),
        "level": _finite_or_none(float(background.level)),
        "count_threshold": int(binomial_min_count(np.array([window - 1]), background.rate, settings.alpha)[0]),
        "value_threshold": _finite_or_none(poisson_min_value(background.level, settings.value_alpha)),
        "level_glass": _finite_or_none(float(background.glass_level)),
    }


def _finite_or_none(value: float):
    return value if np.isfinite(value) else None


def speckle_stack(stack, settings: SpeckleSettings | Sequence[SpeckleSettings] | None = None, *,
                  context=None, spilled=None) -> StepResult:
    """Speckle step on a (C, Y, X) stack, numpy or dask.

    Each channel's background is estimated once on the whole channel (for dask, all
    channels in one pass, computed here), so results do not depend on chunking. With a
    background ``context`` (:func:`plexwash.qc.background_context.roi_background`, computed once
    per ROI) a channel whose settings have ``local_rates`` is fitted per region and tested
    against the background where each pixel lies (see :mod:`.speckle_tests`).

    Parameters
    ----------
    stack : (C, Y, X) array_like or dask array
        Not modified.
    settings : SpeckleSettings or sequence of them, optional
        One for all channels, or one per channel. A channel whose settings have
        ``enabled=False`` passes through unchanged (zero removed map).
    context : BackgroundContext, optional
        The ROI's background context (same Y, X as the stack). Without it every channel
        has one background rate.
    spilled : (C, Y, X) array_like or dask array, optional
        What compensation removed from each channel (its input minus its output). With it,
        the residue of removed spillover is set to 0 first (``residue_alpha``,
        :func:`.speckle_tests.drop_residue`); the background is estimated before that.

    Returns
    -------
    StepResult
        ``(cleaned, removed, stats)``: float32 stacks and one stats dict per channel
        (``enabled``, ``rate``, ``level``, ``count_threshold``, ``value_threshold``,
        ``level_glass``, ``n_removed``, ``removed_fraction``; with a context the rate and
        level are the tissue's).

    Examples
    --------
    >>> import numpy as np
    >>> stack = np.zeros((1, 30, 30), np.float32); stack[0, 3, 3] = 1.0
    >>> cleaned, removed, st = speckle_stack(stack)
    >>> float(removed[0, 3, 3]), st[0]["n_removed"]
    (1.0, 1)
    """
    stack = as_stack(stack)
    per_channel = per_channel_settings(settings, SpeckleSettings, stack.shape[0])
    for s in per_channel:
        if s.enabled:
            check_window(stack.shape, s.radius)
    zone = None
    if context is not None:
        zone = np.ascontiguousarray(context.zone, np.uint8)
        if zone.shape != tuple(stack.shape[1:]):
            raise InputError("context", f"zone map {zone.shape} differs from the stack's {tuple(stack.shape[1:])}")
    backgrounds = {}
    if is_dask(stack):
        import dask

        enabled = [c for c, s in enumerate(per_channel) if s.enabled]
        zoned = {c: zone is not None and per_channel[c].local_rates for c in enabled}
        histograms = dask.compute(*[centre_histogram_dask(stack[c], per_channel[c].threshold, per_channel[c].radius,
                                                          zone if zoned[c] else None)
                                    for c in enabled])
        for c, histogram in zip(enabled, histograms, strict=True):
            backgrounds[c] = (_regional_background if zoned[c] else _background_from_histogram)(
                np.asarray(histogram), per_channel[c])

    if spilled is not None and tuple(spilled.shape) != tuple(stack.shape):
        raise InputError("spilled", f"shape {tuple(spilled.shape)} differs from the stack's {tuple(stack.shape)}")

    def channel_step(c, image, s, out, removed):
        ghost = None if spilled is None else np.asarray(spilled[c], np.float32)
        return _speckle_numpy(image, s, None, out, removed, zone=zone if s.local_rates else None, spilled=ghost)

    def block_kernel(c, s):
        kernel = functools.partial(_speckle_block, params=filter_parameters(s, backgrounds[c]), settings=s)
        return kernel, speckle_depth(s), _speckle_stats(s, backgrounds[c])

    passive = {"rate": None, "level": None, "count_threshold": None, "value_threshold": None,
               "level_glass": None, "n_removed": 0}
    return run_stack(stack, per_channel, channel_step, passive=passive,
                     block_kernel=block_kernel, count_key="n_removed", zone=zone, spilled=spilled)


