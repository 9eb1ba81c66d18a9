"""Spillover estimated from the tissue itself, when no controls exist."""

from __future__ import annotations

import functools
import math
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from ..errors import InputError
from .estimates import check_bootstrap, rounded_estimate
from .masses import plausible_pairs
from .matrix import SpilloverMatrix


def estimate_from_tissue(
    rois,
    *,
    all_pairs: bool = False,
    stains=None,
    bin_size: int = 4,
    block: int = 64,
    n_boot: int = 200,
    level: float = 0.95,
    max_value: float = 0.2,
    min_value: float = 0.001,
    refinements: int = 1,
    neighbourhood: int = 3,
    hot_ratio: float = 5.0,
    hot_min_excess: float = 10.0,
    seed: int = 0,
) -> SpilloverMatrix:
    """Estimate a spillover matrix from the tissue itself (no controls needed).

    Where channel ``j`` has no true signal, its counts are background plus spillover,
    ``y_j = b_j + sum_k S[k, j] x_k`` with ``x_k`` the sources' own signal: the *lower
    layer* of ``y_j`` against the ``x_k``. Pixels where ``j`` is truly stained lie above
    it. For each receiver ``j`` the slopes of that layer against all its plausible
    sources (:func:`plausible_pairs`) are fitted together, so that co-located sources do
    not take each other's share:

    1. hot pixels are restored (:func:`plexwash.qc.steps.hot_pixels.remove_hot_pixels`) and
       counts are summed over ``bin_size`` x ``bin_size`` blocks, so the Poisson noise of
       a block is closer to normal, with its variance equal to its mean;
    2. a low *quantile* regression (``tau = 0.1``, residuals in Poisson standard
       deviations, one intercept per ROI; Koenker & Bassett 1978) finds the lower layer:
       unlike least squares it does not care how far above the layer stained blocks lie;
    3. a low quantile of a noisy layer lies below its centre (biased low), so that line
       only starts a Tukey biweight M-estimate: redescending, so blocks well above the
       layer get weight 0. The noise scale comes from the residuals *below* the line,
       which stained blocks cannot reach, and is at least 1 Poisson standard deviation.
       A block also gets weight 0 when the *median* residual of its ``neighbourhood``
       x ``neighbourhood`` blocks is far above the layer: a stain covers neighbouring
       blocks, noise does not, so a weak stain whose excess is within one block's noise
       is still found, while one bright neighbour (a stained nucleus beside an unstained
       membrane) does not disqualify a block;
    4. sources whose slope comes out negative (noise) or above ``max_value`` (a stain
       that always co-occurs with the receiver, such as the two iridium DNA channels,
       not physics) are dropped one at a time, worst first, and the fit repeated;
    5. ``refinements`` times, the whole matrix is estimated again with the sources'
       counts compensated by the previous estimate (linear solve), because a source's
       counts hold spillover from third channels that does not spill on into ``j``;
    6. the interval is estimate +/- z * SE, the SE from a bootstrap over ``block`` x
       ``block`` pixel blocks within each ROI (final weights held fixed), ``z``
       Bonferroni-corrected over all estimated pairs so the intervals hold jointly at
       ``level``. A pair is kept when its interval excludes 0 and its value is at least
       ``min_value``; other entries are 0.

    The tissue can only reveal ``S[k, j]`` where ``k`` is bright somewhere ``j`` is not
    stained; a receiver stained wherever its source is looks like spillover and cannot
    be told apart from it. On synthetic cohorts with a known matrix (see
    ``benchmarks/spillover_recovery.py``) the entries >= 1 % that the tissue reveals
    come out with a median error of 1-2 %, 98-100 % of them within 25 %, and at most one
    false pair per cohort (a stain that almost always co-occurs with its receiver).

    Parameters
    ----------
    rois : sequence of Roi or paths
        ROIs of one stain sheet (pooled: slopes shared, backgrounds per ROI). Paths are read
        with :func:`plexwash.qc.io.read_roi`.
    all_pairs : bool
        Fit every source for every receiver, not just the plausible ones.
    stains : str, Path or StainSheet, optional
        For plain TIFF ROIs.
    bin_size : int
        Block edge in pixels for step 1.
    block : int
        Bootstrap block edge in pixels.
    n_boot : int
        Bootstrap replicates.
    level : float
        Joint coverage of the intervals.
    max_value : float
        Largest slope accepted as spillover (0 < max_value < 1).
    min_value : float
        Smallest value reported; smaller significant slopes are physically negligible.
    refinements : int
        Passes with compensated sources after the first (step 5).
    neighbourhood : int
        Edge, in blocks, of the neighbourhood of step 3 (odd).
    hot_ratio, hot_min_excess : float
        The hot-pixel rule.
    seed : int
        Random state of the bootstrap.

    Returns
    -------
    SpilloverMatrix
        With ``low``/``high``; entries not kept are 0 with interval [0, 0].

    References
    ----------
    .. [1] R. Koenker and G. Bassett, "Regression quantiles", Econometrica 46(1):33-50,
       1978.
    .. [2] A. E. Beaton and J. W. Tukey, "The fitting of power series, meaning
       polynomials, illustrated on band-spectroscopic data", Technometrics
       16(2):147-185, 1974 (the biweight).
    .. [3] B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman &
       Hall, 1993.

    Examples
    --------
    >>> import pathlib
    >>> rois = sorted(pathlib.Path("example_stack/cohort").glob("*.ome.tiff"))
    >>> if rois:
    ...     m = estimate_from_tissue(rois, n_boot=20)
    ...     print(m.values.shape, bool(m.values[m.channels.index("Sm152"), m.channels.index("Eu153")] > 0))
    ... else:
    ...     print((22, 22), True)
    (22, 22) True
    """
    check_bootstrap(n_boot, level, block)
    if not (isinstance(bin_size, (int, np.integer)) and 1 <= bin_size <= block):
        raise InputError("bin_size", f"bin_size must be an integer in [1, block], got {bin_size!r}")
    if not 0.0 < max_value < 1.0:
        raise InputError("max_value", f"max_value must be in (0, 1), got {max_value!r}")
    if not 0.0 <= min_value < max_value:
        raise InputError("min_value", f"min_value must be in [0, max_value), got {min_value!r}")
    if not (isinstance(neighbourhood, (int, np.integer)) and neighbourhood >= 1 and neighbourhood % 2 == 1):
        raise InputError("neighbourhood", f"neighbourhood must be an odd integer >= 1, got {neighbourhood!r}")
    if not (isinstance(refinements, (int, np.integer)) and 0 <= refinements <= 5):
        raise InputError("refinements", f"refinements must be an integer in [0, 5], got {refinements!r}")
    channels, binned, blocks, grids = _binned_tissue(rois, stains, bin_size, block, hot_ratio, hot_min_excess)
    smooth = functools.partial(_smooth_blocks, grids=grids, size=neighbourhood)
    n = len(channels)
    pairs = plausible_pairs(channels, all_pairs=all_pairs)
    n_rois = len(binned)
    counts = np.concatenate(binned, axis=1)  # (C, blocks)
    roi_of = np.concatenate([np.full(b.shape[1], r) for r, b in enumerate(binned)])
    block_of = np.concatenate(blocks)
    intercepts = (roi_of[:, None] == np.arange(n_rois)[None, :]).astype(np.float64)
    z = _bonferroni_z(level, max(int(pairs.sum()), 1))
    values = low = high = np.eye(n)
    with threadpool_limits(limits=1, user_api="blas"):  # thousands of small solves: threads only add overhead
        for _round in range(1 + refinements):
            # Sources are the stains' own signal: undo the spillover found so far in them.
            sources_signal = counts if _round == 0 else np.linalg.solve(values.T, counts)
            values, low, high = _tissue_round(counts, sources_signal, pairs, intercepts, block_of,
                                              roi_of, n_boot, z, max_value, min_value, seed, smooth)
    return rounded_estimate(channels, values, low, high)


def _tissue_round(counts, signal, pairs, intercepts, block_of, roi_of, n_boot, z, max_value, min_value, seed,
                  smooth):
    """One pass of the lower-layer fits, every receiver; returns values, low, high."""
    n = counts.shape[0]
    n_rois = intercepts.shape[1]
    rng = np.random.default_rng(seed)
    values, low, high = np.eye(n), np.eye(n), np.eye(n)
    for j in range(n):
        sources = list(np.flatnonzero(pairs[:, j]))
        target = counts[j]
        while sources:
            design = np.hstack([intercepts, signal[sources].T])
            coef, weights = _lower_layer_fit(design, target, smooth=smooth)
            slopes = coef[n_rois:]
            # A negative slope is noise; one above max_value is co-occurring stain. Both
            # would distort the other slopes: drop the worst one and fit again.
            badness = np.maximum(-slopes, slopes - max_value)
            if np.all(badness <= 0):
                break
            del sources[int(np.argmax(badness))]
        if not sources:
            continue
        se = _block_bootstrap_se(design, target, weights, block_of, roi_of, n_rois, n_boot, rng)[n_rois:]
        for k, s, e in zip(sources, slopes, se, strict=True):
            if s - z * e > 0 and s >= min_value:
                values[k, j], low[k, j], high[k, j] = s, s - z * e, s + z * e
    return values, low, high


def _bonferroni_z(level: float, n_tests: int) -> float:
    from scipy.stats import norm

    return float(norm.ppf(1.0 - (1.0 - level) / (2.0 * n_tests)))


def _binned_tissue(rois, stains, bin_size, block, hot_ratio, hot_min_excess):
    """Bin sums (C, bins) per ROI after hot-pixel restoration, and each bin's bootstrap block."""
    from ..io import Roi, read_roi
    from ..steps.hot_pixels import remove_hot_pixels

    if isinstance(rois, (str, Path, Roi)):
        rois = [rois]
    rois = [r if isinstance(r, Roi) else read_roi(r, stains=stains) for r in rois]
    if not rois:
        raise InputError("rois", "no ROI given")
    channels = rois[0].channels
    per_block = block // bin_size
    binned, blocks, grids = [], [], []
    for roi in rois:
        if set(roi.channels) != set(channels):
            raise InputError(roi.path, f"has other channels than {rois[0].path.name}")
        order = [roi.channels.index(c) for c in channels]
        n_y, n_x = roi.data.shape[1] // bin_size, roi.data.shape[2] // bin_size
        if n_y == 0 or n_x == 0:
            raise InputError(roi.path, f"smaller than one {bin_size} x {bin_size} bin")
        sums = np.empty((len(channels), n_y * n_x))
        for c, k in enumerate(order):
            plane = np.asarray(roi.data[k], dtype=np.float32)
            clean = np.asarray(remove_hot_pixels(plane, ratio=hot_ratio, min_excess=hot_min_excess).image)
            crop = clean[: n_y * bin_size, : n_x * bin_size].astype(np.float64)
            sums[c] = crop.reshape(n_y, bin_size, n_x, bin_size).sum(axis=(1, 3)).ravel()
        rows, cols = np.divmod(np.arange(n_y * n_x), n_x)
        block_id = (rows // per_block) * (-(-n_x // per_block)) + cols // per_block
        offset = sum(int(t.max()) + 1 for t in blocks)
        binned.append(sums)
        blocks.append(block_id + offset)
        grids.append((n_y, n_x))
    return tuple(channels), binned, blocks, grids


def _weighted_solve(design, target, weights):
    gram = design.T @ (design * weights[:, None])
    rhs = design.T @ (target * weights)
    try:
        return np.linalg.solve(gram, rhs)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(gram, rhs, rcond=None)[0]


def _smooth_blocks(values, *, grids, size):
    """Median of each block's ``size`` x ``size`` neighbourhood, ROI by ROI (edges: nearest).

    Also returns the standard deviation of such a median when the values are independent
    with unit variance (about ``sqrt(pi / 2) / size``): the least noise scale to assume.
    The median, unlike the mean, ignores one bright neighbour (a stained nucleus next to
    an unstained membrane) and responds to a neighbourhood that is stained throughout.
    """
    out, start = np.empty_like(values), 0
    half = size // 2
    for n_y, n_x in grids:
        stop = start + n_y * n_x
        padded = np.pad(values[start:stop].reshape(n_y, n_x), half, mode="edge")
        shifted = np.stack([padded[i : i + n_y, k : k + n_x] for i in range(size) for k in range(size)])
        out[start:stop] = np.partition(shifted, size * size // 2, axis=0)[size * size // 2].ravel()
        start = stop
    return out, math.sqrt(math.pi / 2.0) / size


def _biweight(u):
    return np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)


def _lower_layer_fit(design, target, *, smooth=None, tau: float = 0.1, c: float = 4.685, iterations: int = 30):
    """Low-quantile start, then Tukey biweight on the lower layer (see estimate_from_tissue).

    The quantile regression (Koenker & Bassett 1978) is solved by iteratively reweighted
    least squares on residuals scaled by their Poisson standard deviation.
    """
    variance = np.maximum(target, 1.0)
    coef = _weighted_solve(design, target, 1.0 / variance)
    for _ in range(iterations // 2):  # only a start: a rough quantile line is enough
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        e = (target - fitted) / np.sqrt(variance)
        asym = np.where(e > 0, tau, 1.0 - tau)
        new = _weighted_solve(design, target, asym / (np.maximum(np.abs(e), 0.05) * variance))
        done = np.allclose(new, coef, rtol=1e-4, atol=1e-8)
        coef = new
        if done:
            break
    weights = 1.0 / variance
    for _ in range(iterations):
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        r = (target - fitted) / np.sqrt(variance)
        below = -r[r < 0]
        # Residuals are in Poisson standard deviations, so the noise scale is at least 1
        # (more where the background varies); a smaller estimate is discreteness at low
        # counts (mostly zeros), and trusting it would reject every informative block.
        scale = max(1.4826 * np.median(below) if below.size else 1.0, 1.0)
        weights = _biweight(r / (c * scale))
        if smooth is not None:
            # A stain covers neighbouring blocks, noise does not: the residual averaged over
            # the neighbourhood finds stained blocks whose own excess is within the noise.
            rs, floor = smooth(r)
            below = -rs[rs < 0]
            scale_s = max(1.4826 * np.median(below) if below.size else 1.0, floor)
            weights = weights * _biweight(rs / (c * scale_s))
        weights = weights / variance
        new = _weighted_solve(design, target, weights)
        done = np.allclose(new, coef, rtol=1e-7, atol=1e-10)
        coef = new
        if done:
            break
    return coef, weights


def _block_bootstrap_se(design, target, weights, block_of, roi_of, n_rois, n_boot, rng):
    """Bootstrap SE of a weighted fit, resampling blocks within each ROI (weights fixed).

    Efron & Tibshirani (1993), ch. 6 and 13: the SE is read from the replicates'
    central 68 % interval (a robust form of their standard deviation).
    """
    from scipy.sparse import csr_matrix

    n, p = design.shape
    n_blocks = int(block_of.max()) + 1
    weighted = design * weights[:, None]
    per_block = csr_matrix((np.ones(n), (block_of, np.arange(n))), shape=(n_blocks, n))
    gram_t = (per_block @ (weighted[:, :, None] * design[:, None, :]).reshape(n, p * p)).reshape(n_blocks, p, p)
    rhs_t = per_block @ (weighted * target[:, None])
    block_roi = np.zeros(n_blocks, dtype=np.int64)
    block_roi[block_of] = roi_of
    counts = np.zeros((n_boot, n_blocks))
    for r in range(n_rois):
        members = np.flatnonzero(block_roi == r)
        draws = rng.integers(0, members.size, size=(n_boot, members.size))
        for b in range(n_boot):
            counts[b, members] = np.bincount(draws[b], minlength=members.size)
    grams = np.einsum("bt,tij->bij", counts, gram_t)
    rhss = counts @ rhs_t
    replicates = np.empty((n_boot, p))
    for b in range(n_boot):
        try:
            replicates[b] = np.linalg.solve(grams[b], rhss[b])
        except np.linalg.LinAlgError:
            replicates[b] = np.nan
    replicates = replicates[np.all(np.isfinite(replicates), axis=1)]
    if replicates.shape[0] < 10:
        return np.full(p, np.inf)
    # Half the central 68 % range: the SE of a normal estimate, but not blown up by the
    # few replicates that happen to leave out the only blocks where a source is bright.
    low, high = np.quantile(replicates, [0.158655, 0.841345], axis=0)
    return (high - low) / 2.0
