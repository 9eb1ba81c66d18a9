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

from .._arrays import channel_plane
from ..background import BackgroundSettings, tissue_mask

#: The tissue mask's default settings (a frozen object, safe as a default argument).
DEFAULT_BACKGROUND = BackgroundSettings()


def roi_tissue(stack, *, settings: BackgroundSettings = DEFAULT_BACKGROUND) -> np.ndarray:
    """(Y, X) bool tissue mask of a (C, Y, X) stack, every channel used.

    The same as ``tissue_mask(stack, settings=settings)``: the channels are summed here in
    the same order, and the glass limit (per channel) is scaled by the number of channels
    the one summed plane stands for.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> rate = np.full((120, 120), 0.01); rate[:, 50:] = 0.12
    >>> stack = rng.poisson(np.broadcast_to(rate, (10, 120, 120)))
    >>> bool(np.array_equal(roi_tissue(stack), tissue_mask(stack)))
    True
    """
    shape = tuple(int(n) for n in np.shape(stack))
    total = np.zeros(shape[1:], np.float64)
    for c in range(shape[0]):
        total += channel_plane(stack, c)
    if not np.all(np.isfinite(total)):  # the channels' own checks name the bad one
        return np.ones(shape[1:], bool)
    summed = dataclasses.replace(settings, glass_rate=settings.glass_rate * max(shape[0], 1))
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
