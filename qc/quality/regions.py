"""Tissue and glass for the quality measurements: the ROI's tissue mask, binned.

The mask is :func:`plexwash.qc.background.tissue_mask` (Otsu's split of the smoothed,
log-scaled sum of the channels; see that module), computed from the channels summed one
at a time so that a lazy stack is never held in memory whole. SBR and SNR are measured
inside the tissue and the empty test fits one background rate on glass and one in tissue
(:mod:`.ghosts`); a ROI without glass is all tissue and is measured as before.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import ndimage

from .._arrays import channel_plane
from ..background import BackgroundSettings, tissue_mask

#: The tissue mask's default settings (a frozen object, safe as a default argument).
DEFAULT_BACKGROUND = BackgroundSettings()


def summed_channels(stack, also=None):
    """(Y, X) float64: the channels of a (C, Y, X) stack summed, one channel at a time.

    With ``also`` (a function of one plane and its channel index giving a (Y, X) int8 map),
    also the largest of every channel's map at each pixel: returns ``(total, largest)``.
    """
    shape = tuple(int(n) for n in np.shape(stack))
    total = np.zeros(shape[1:], np.float64)
    largest = np.zeros(shape[1:], np.int8)
    for c in range(shape[0]):
        plane = channel_plane(stack, c)
        total += plane
        if also is not None:
            np.maximum(largest, also(plane, c), out=largest)
    return total if also is None else (total, largest)


def roi_tissue(total: np.ndarray, n_channels: int, *,
               settings: BackgroundSettings = DEFAULT_BACKGROUND) -> np.ndarray:
    """(Y, X) bool tissue mask from the sum of a stack's ``n_channels`` channels.

    The same as ``tissue_mask(stack, settings=settings)`` with every channel used: the
    glass limit (per channel) is scaled by the number of channels the summed plane stands
    for. All True when the sum is not finite (the channels' own checks name the bad one).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> rate = np.full((120, 120), 0.01); rate[:, 50:] = 0.12
    >>> stack = rng.poisson(np.broadcast_to(rate, (10, 120, 120)))
    >>> mask = roi_tissue(summed_channels(stack), 10)
    >>> bool(np.array_equal(mask, tissue_mask(stack)))
    True
    """
    if not np.all(np.isfinite(total)):
        return np.ones(total.shape, bool)
    summed = dataclasses.replace(settings, glass_rate=settings.glass_rate * max(n_channels, 1))
    return tissue_mask(total[None], settings=summed)


def has_glass(tissue) -> bool:
    """Whether a mask splits the ROI (some tissue and some glass)."""
    return tissue is not None and bool(tissue.any()) and not bool(tissue.all())


def binned_tissue(tissue: np.ndarray, size: int) -> np.ndarray:
    """Tissue pixels per ``size`` x ``size`` bin (the last row/column of bins may be partial).

    Examples
    --------
    >>> binned_tissue(np.eye(5, dtype=bool), 2).tolist()
    [[2.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 1.0]]
    """
    mask = np.asarray(tissue, np.float64)
    rows = np.add.reduceat(mask, np.arange(0, mask.shape[0], size), axis=0)
    return np.add.reduceat(rows, np.arange(0, mask.shape[1], size), axis=1)


#: Pixels this close to the tissue's edge (Chebyshev distance) are left out of the stripe
#: test's quiet pixels: the lines two away plus a margin for the smoothed mask's edge.
EDGE_MARGIN = 5


def away_from_edges(tissue, margin: int = EDGE_MARGIN):
    """(Y, X) bool: pixels farther than ``margin`` from the other region; None without glass.

    Examples
    --------
    >>> mask = np.zeros((3, 12), bool); mask[:, 6:] = True
    >>> away_from_edges(mask, 2)[0].astype(int).tolist()
    [1, 1, 1, 1, 0, 0, 0, 0, 1, 1, 1, 1]
    """
    if not has_glass(tissue):
        return None
    size = 2 * margin + 1
    near_tissue = ndimage.maximum_filter(tissue, size=size, mode="nearest")
    near_glass = ndimage.maximum_filter(~tissue, size=size, mode="nearest")
    return ~(near_tissue & near_glass)
