"""The receivers' background in the tissue spillover fit: strata and a shared covariate.

Tissue lies on glass, and inside the tissue every channel's background drifts. Pixels
where a source is bright lie in tissue, where every receiver's background is higher than
on the glass; a fit with one background level per ROI reads that difference as spillover.
So the fit models each receiver's background per *stratum* (ROI x region, region = glass
or tissue from :func:`plexwash.qc.background.tissue_mask`), each stratum's background
proportional to the variation shared by all channels
(:func:`plexwash.qc.background.shared_modulation`, computed from each channel's
:func:`~plexwash.qc.background.local_background`). The scale of every stratum is a free
coefficient of the fit, so a receiver's ghosts cannot bias its background level; only
the *shape* comes from the model.

Bins that straddle the tissue edge (part glass, part tissue) are left out of the fit:
their background is a mixture whose share is known only to the mask's precision.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..background import (
    BackgroundSettings,
    local_background,
    shared_modulation,
    tissue_mask,
)


@dataclasses.dataclass(frozen=True)
class BinnedBackground:
    """One ROI's background at the fit's resolution (``bins`` = bins of that ROI).

    ``covariates`` (2, bins): per bin, the sum of the shared variation over its glass
    pixels and over its tissue pixels (a row of zeros when the ROI has no glass);
    ``rates`` (C, bins): each channel's own background estimate summed over the bin (used
    only to measure how bright a source is above its background); ``mixed`` (bins,)
    bool: bins on the tissue edge.
    """

    covariates: np.ndarray
    rates: np.ndarray
    mixed: np.ndarray


def bin_sums(plane: np.ndarray, size: int) -> np.ndarray:
    """Sums of ``plane`` over ``size`` x ``size`` bins (edges cropped), raveled."""
    n_y, n_x = plane.shape[0] // size, plane.shape[1] // size
    crop = np.asarray(plane[: n_y * size, : n_x * size], np.float64)
    return crop.reshape(n_y, size, n_x, size).sum(axis=(1, 3)).ravel()


def binned_background(stack: np.ndarray, size: int,
                      settings: BackgroundSettings | None = None) -> BinnedBackground:
    """Background strata and covariates of one hot-pixel-free (C, Y, X) stack, binned.

    The tissue mask, the channels' local rates and their shared variation follow
    :func:`plexwash.qc.background.background_model` (its first, per-channel pass: the
    fit below sets every stratum's scale itself).

    Examples
    --------
    >>> rng = np.random.default_rng(5)
    >>> rate = np.full((160, 160), 0.01); rate[:, 80:] = 0.1
    >>> b = binned_background(rng.poisson(np.broadcast_to(rate, (6, 160, 160))), 4)
    >>> b.covariates.shape, int(b.mixed.sum()) <= 40
    ((2, 1600), True)
    >>> bool(b.covariates[0][:5].min() > 0), bool(b.covariates[1][:5].max() == 0)
    (True, True)
    """
    settings = BackgroundSettings() if settings is None else settings
    stack = np.asarray(stack)
    tissue = tissue_mask(stack, settings=settings)
    rough = dataclasses.replace(settings, passes=1)
    rates = np.empty(stack.shape, np.float32)
    region_rates = np.full((stack.shape[0], 2), np.nan)
    for c in range(stack.shape[0]):
        rates[c], region_rates[c] = local_background(stack[c], mask=tissue, settings=rough,
                                                     return_regions=True)
    pattern = shared_modulation(rates, region_rates, tissue).astype(np.float64)
    glass = bin_sums(np.where(tissue, 0.0, pattern), size)
    inside = bin_sums(np.where(tissue, pattern, 0.0), size)
    tissue_share = bin_sums(tissue.astype(np.float64), size) / float(size * size)
    mixed = (tissue_share > 0) & (tissue_share < 1)
    binned_rates = np.stack([bin_sums(r, size) for r in rates])
    return BinnedBackground(covariates=np.stack([glass, inside]), rates=binned_rates, mixed=mixed)
