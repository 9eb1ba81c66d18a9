"""Counting positive neighbours for the speckle step's background fit, whole or in chunks.

The fit (:func:`.speckle_tests.fit_rate`) needs, over full windows, how many have a
positive centre or not and ``n`` positive neighbours: :func:`centre_histogram` on a numpy
channel, :func:`centre_histogram_dask` block by block on a dask channel (the same numbers
whatever the chunking), and :func:`region_histogram` split by the part of the ROI
(glass, tissue, their edges) the centre lies in.
"""

from __future__ import annotations

import functools

import numpy as np
from plexwash.qc.steps import _kernels as _k  # absolute: one numba cache, whatever imported us
from plexwash.qc.steps import _search_kernels as _sk

from ..background_context import PARTS, ZONES_PER_PART
from ..errors import InputError

__all__ = ["centre_histogram", "centre_histogram_dask", "check_window", "region_histogram", "window_counts"]


def window_counts(image: np.ndarray, threshold: float, radius: int) -> np.ndarray:
    """Positive pixels (``> threshold``) in each pixel's ``(2r+1)^2`` window (uint16, clipped)."""
    counts = np.empty(image.shape, np.uint16)
    _k.window_counts(image, np.float32(threshold), int(radius), counts)
    return counts


def centre_histogram(image: np.ndarray, counts: np.ndarray, threshold: float, radius: int) -> np.ndarray:
    """``histogram[c, n]``: full windows with centre positive (c = 1) or not and n positive neighbours."""
    radius = int(radius)
    histogram = np.zeros((2, (2 * radius + 1) ** 2), np.int64)
    _k.centre_histogram(image, counts, np.float32(threshold), radius, histogram)
    return histogram


def _codes_block(block, threshold, radius):
    """Per pixel ``n + c * (2r+1)^2`` (uint16), to histogram a dask channel block by block."""
    block = np.ascontiguousarray(block)
    counts = np.empty(block.shape, np.uint16)
    _k.window_counts(block, threshold, radius, counts)
    positive = block > threshold
    return (counts - positive + positive * np.uint16((2 * radius + 1) ** 2)).astype(np.uint16)


def _histogram_block(block, region=None, *, size):
    codes = block.ravel().astype(np.int64)
    if region is None:
        return np.bincount(codes, minlength=size).reshape(1, 1, size)
    codes += region.ravel().astype(np.int64) * size
    return np.bincount(codes, minlength=len(PARTS) * size).reshape(1, 1, len(PARTS) * size)


def centre_histogram_dask(image, threshold: float, radius: int, zone=None):
    """:func:`centre_histogram` of a dask channel (lazy, independent of chunking).

    With a ``zone`` map (numpy, the channel's shape): :func:`region_histogram`.
    """
    import dask.array as da

    radius = int(radius)
    check_window(image.shape, radius)
    codes = image.map_overlap(
        functools.partial(_codes_block, threshold=np.float32(threshold), radius=radius),
        depth=radius,
        boundary="none",
        dtype=np.uint16,
        meta=np.empty((0, 0), np.uint16),
    )
    inner = (slice(radius, image.shape[0] - radius), slice(radius, image.shape[1] - radius))
    size = 2 * (2 * radius + 1) ** 2
    arrays = [codes[inner]]
    if zone is not None:
        region = da.from_array((np.asarray(zone) // ZONES_PER_PART).astype(np.uint8), chunks=image.chunks)
        arrays.append(region[inner])
    bins = size if zone is None else size * len(PARTS)
    per_block = da.map_blocks(
        functools.partial(_histogram_block, size=size),
        *arrays,
        new_axis=2,
        chunks=(1, 1, bins),
        dtype=np.int64,
        meta=np.empty((0, 0, 0), np.int64),
    )
    total = per_block.sum(axis=(0, 1))
    return total.reshape(2, size // 2) if zone is None else total.reshape(len(PARTS), 2, size // 2)


def region_histogram(image: np.ndarray, counts: np.ndarray, threshold: float, radius: int, zone) -> np.ndarray:
    """``histogram[part, c, n]``: :func:`centre_histogram` split by the zone part of the centre."""
    radius = int(radius)
    size = (2 * radius + 1) ** 2
    histogram = np.zeros((len(PARTS), 2, size), np.int64)
    _sk.region_histogram(np.ascontiguousarray(image), np.ascontiguousarray(counts), np.float32(threshold),
                        radius, np.ascontiguousarray(zone, np.uint8), ZONES_PER_PART, histogram)
    return histogram


def check_window(shape, radius: int) -> None:
    side = 2 * int(radius) + 1
    if shape[-2] < side or shape[-1] < side:
        raise InputError(
            "speckle.radius", f"window of {side} px is larger than the image ({shape[-2]} x {shape[-1]})"
        )
