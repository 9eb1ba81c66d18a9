"""Spillover estimated from the tissue itself, when no controls exist."""

from __future__ import annotations

import dataclasses
import functools
import math
from pathlib import Path

import numpy as np

from .._threads import one_thread
from ..errors import InputError
from .estimates import check_bootstrap, rounded_estimate
from .masses import plausible_pairs
from .matrix import SpilloverMatrix
from .tissue_background import bin_sums, binned_background
from .tissue_pairs import REPORTED, TissueEstimate, TissuePair, classify


def estimate_from_tissue(rois, **settings) -> SpilloverMatrix:
    """The spillover matrix of :func:`estimate_tissue_pairs` (same arguments).

    Only the reported pairs are non-zero; pairs the tissue cannot identify are 0 (see
    :attr:`TissueEstimate.not_identifiable` for the list).
    """
    return estimate_tissue_pairs(rois, **settings).matrix


def estimate_tissue_pairs(
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
    false_pair_rate: float = 0.05,
    max_width: float = 0.5,
    background_error: float = 0.05,
    negligible: float = 0.003,
) -> TissueEstimate:
    """Estimate a spillover matrix from the tissue itself (no controls needed).

    Where channel ``j`` has no true signal, its counts are background plus spillover,
    ``y_j = b_j + sum_k S[k, j] x_k`` with ``x_k`` the sources' own signal: the *lower
    layer* of ``y_j`` against the ``x_k``. Pixels where ``j`` is truly stained lie above
    it. For each receiver ``j`` the slopes of that layer against all its plausible
    sources (:func:`plausible_pairs`: M +/- 1, same element, M + 16 unless ``all_pairs``)
    are fitted together, so that co-located sources do not take each other's share:

    1. hot pixels are restored (:func:`plexwash.qc.steps.hot_pixels.remove_hot_pixels`) and
       counts are summed over ``bin_size`` x ``bin_size`` blocks, so the Poisson noise of
       a block is closer to normal, with its variance equal to its mean;
    2. **the receiver's background varies**: tissue lies on glass and drifts, and the
       pixels where a source is bright all lie in tissue. ``b_j`` is therefore modelled
       per stratum (ROI x region, glass or tissue, from the tissue mask of
       :mod:`plexwash.qc.background`), each stratum proportional to the background
       variation shared by all channels, with a free scale per stratum and receiver
       (:mod:`.tissue_background`). Blocks on the tissue edge are left out. The sources
       enter with their own background taken off (their signal);
    3. a low *quantile* regression (``tau = 0.1``, residuals in Poisson standard
       deviations; Koenker & Bassett 1978) finds the lower layer: unlike least squares it
       does not care how far above the layer stained blocks lie;
    4. a low quantile of a noisy layer lies below its centre (biased low), so that line
       only starts a Tukey biweight M-estimate (robust regression, Beaton & Tukey 1974):
       redescending, so blocks well above the layer get weight 0. The noise scale comes
       from the residuals *below* the line, which stained blocks cannot reach, and is at
       least 1 Poisson standard deviation. A block also gets weight 0 when the *median*
       residual of its ``neighbourhood`` x ``neighbourhood`` blocks is far above the
       layer: a stain covers neighbouring blocks, noise does not;
    5. sources whose slope comes out negative (noise) or above ``max_value`` (a stain
       that always co-occurs with the receiver, such as the two iridium DNA channels,
       not physics) are dropped one at a time, worst first, and the fit repeated;
    6. ``refinements`` times, the whole matrix is estimated again with the sources'
       signal compensated by the previous estimate (linear solve), because a source's
       counts hold spillover from third channels that does not spill on into ``j``;
    7. **false pairs are controlled** by the Benjamini-Hochberg step-up procedure
       (Benjamini & Hochberg 1995; :func:`.estimates.benjamini_hochberg`) at
       ``false_pair_rate`` over every tested pair, on one-sided p-values of ``slope > 0``
       (``z = slope / SE``, normal), the SE from a bootstrap over ``block`` x ``block``
       pixel blocks within each ROI (final weights held fixed; Efron & Tibshirani 1993).
       Intervals are ``slope +/- z SE`` at the false-coverage-adjusted level
       ``1 - R (1 - level) / m`` for ``R`` selected of ``m`` tested pairs (Benjamini &
       Yekutieli 2005);
    8. **each tested pair gets a status** (:class:`TissuePair`): *reported* (selected,
       at least ``min_value``, its interval's half-width at most ``max_width`` times the
       value: the matrix holds it); *absent* (slope negative, or interval below
       ``negligible``); or *not identifiable* (0 in the matrix, listed with its reason):
       the source is *dim* (a background error of ``background_error`` times the
       receiver's fitted tissue background, spread over the source's information-weighted
       signal level, would exceed ``max_bias`` = 25 % of the value, or of ``negligible``),
       its interval is wide, the slope went above ``max_value``, the receiver is as high
       on the bins around the source's ghost as on the ghost itself (a stain of its own
       over the source's region: spillover stays in the source's pixels), or it scatters
       more than twice its Poisson noise around the fit where the ghost shows (its own
       stain goes with the source: spillover is a fixed share, a stain varies by cell).

    The tissue can only reveal ``S[k, j]`` where ``k`` is bright somewhere ``j`` is not
    stained; a receiver stained wherever its source is looks like spillover. On the
    independent tissue-on-glass cohort (``benchmarks/tissue_cohort.py``, seed 12) and
    the demo (``benchmarks/tissue_accuracy.py``), see that benchmark for the figures.
    Known limit: a receiver stain carried by exactly the source's cells, in proportion to
    it, is spillover as far as the tissue can tell.

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
    false_pair_rate : float
        Benjamini-Hochberg false discovery rate over the tested pairs (step 7).
    max_width : float
        Widest interval half-width, as a share of the value, of a reported pair.
    background_error : float
        Relative error of the receiver's background assumed for the dim-source rule.
    negligible : float
        A pair whose interval lies below this is absent (0.003 = 0.3 %).

    Returns
    -------
    TissueEstimate
        ``matrix`` (with ``low``/``high``; entries not reported are 0 with interval
        [0, 0]) and ``pairs``, every tested pair's :class:`TissuePair`.

    References
    ----------
    .. [1] R. Koenker and G. Bassett, "Regression quantiles", Econometrica 46(1):33-50,
       1978.
    .. [2] A. E. Beaton and J. W. Tukey, "The fitting of power series, meaning
       polynomials, illustrated on band-spectroscopic data", Technometrics
       16(2):147-185, 1974 (the biweight).
    .. [3] B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman &
       Hall, 1993.
    .. [4] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate", J. R.
       Stat. Soc. B 57(1):289-300, 1995.
    .. [5] Y. Benjamini and D. Yekutieli, "False discovery rate-adjusted multiple
       confidence intervals for selected parameters", JASA 100(469):71-81, 2005.

    Examples
    --------
    >>> import pathlib
    >>> rois = sorted(pathlib.Path("example_stack/cohort").glob("*.ome.tiff"))
    >>> if rois:
    ...     m = estimate_tissue_pairs(rois, n_boot=20).matrix
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
    if not 0.0 < false_pair_rate < 1.0:
        raise InputError("false_pair_rate", f"false_pair_rate must be in (0, 1), got {false_pair_rate!r}")
    if not max_width > 0.0:
        raise InputError("max_width", f"max_width must be > 0, got {max_width!r}")
    if not background_error >= 0.0:
        raise InputError("background_error", f"background_error must be >= 0, got {background_error!r}")
    if not 0.0 <= negligible < max_value:
        raise InputError("negligible", f"negligible must be in [0, max_value), got {negligible!r}")
    return _estimate(rois, stains=stains, all_pairs=all_pairs, bin_size=bin_size, block=block,
                     n_boot=n_boot, level=level, max_value=max_value, min_value=min_value,
                     refinements=refinements, neighbourhood=neighbourhood, hot_ratio=hot_ratio,
                     hot_min_excess=hot_min_excess, seed=seed, false_pair_rate=false_pair_rate,
                     max_width=max_width, background_error=background_error, negligible=negligible)


def _estimate(rois, *, stains, all_pairs, bin_size, block, n_boot, level, max_value, min_value,
              refinements, neighbourhood, hot_ratio, hot_min_excess, seed, false_pair_rate,
              max_width, background_error, negligible) -> TissueEstimate:
    channels, binned, blocks, grids, backgrounds = _binned_tissue(rois, stains, bin_size, block,
                                                                  hot_ratio, hot_min_excess)
    smooth = functools.partial(_smooth_blocks, grids=grids, size=neighbourhood)
    n = len(channels)
    pairs = plausible_pairs(channels, all_pairs=all_pairs)
    counts = np.concatenate(binned, axis=1)  # (C, bins)
    roi_of = np.concatenate([np.full(b.shape[1], r) for r, b in enumerate(binned)])
    block_of = np.concatenate(blocks)
    strata = _strata_columns(backgrounds)
    usable = ~np.concatenate([b.mixed for b in backgrounds])
    rates = np.concatenate([b.rates for b in backgrounds], axis=1)
    inside = np.concatenate([b.covariates[1] > 0 for b in backgrounds]) & usable
    area = float(bin_size * bin_size)
    fit = _Fit(strata=strata, usable=usable, inside=inside, grids=grids, block_of=block_of,
               roi_of=roi_of, smooth=smooth, n_boot=n_boot, max_value=max_value, area=area)
    values = np.eye(n)
    with one_thread("blas"):  # thousands of small solves: threads only add overhead
        for _round in range(1 + refinements):
            # Sources are the stains' own signal: their background taken off, and the
            # spillover found so far undone.
            signal = counts - rates
            if _round:
                signal = np.linalg.solve(values.T, signal)
            found = _tissue_round(counts, signal, pairs, fit, seed)
            rows = classify(found, level=level, min_value=min_value,
                             false_pair_rate=false_pair_rate, max_width=max_width,
                             background_error=background_error, negligible=negligible)
            values, low, high = np.eye(n), np.eye(n), np.eye(n)
            for row in rows:
                if row["status"] == REPORTED:
                    k, j = row["source"], row["receiver"]
                    values[k, j], low[k, j], high[k, j] = row["estimate"], row["low"], row["high"]
    matrix = rounded_estimate(channels, values, low, high)
    out = tuple(TissuePair(source=channels[r["source"]], receiver=channels[r["receiver"]],
                           status=r["status"], reason=r["reason"],
                           estimate=round(float(r["estimate"]), 6), low=round(float(r["low"]), 6),
                           high=round(float(r["high"]), 6), p_value=float(r["p_value"]),
                           source_level=round(float(r["level"]), 4),
                           scatter=round(float(r["scatter"]), 3), ring=round(float(r["ring"]), 3))
                for r in rows)
    return TissueEstimate(matrix=matrix, pairs=out, false_pair_rate=false_pair_rate)


def _strata_columns(backgrounds) -> np.ndarray:
    """(bins, strata): each ROI x region's shared background variation, zero elsewhere."""
    total = sum(b.covariates.shape[1] for b in backgrounds)
    columns, start = [], 0
    for b in backgrounds:
        stop = start + b.covariates.shape[1]
        for row in b.covariates:
            if np.any(row > 0):
                column = np.zeros(total)
                column[start:stop] = row
                columns.append(column)
        start = stop
    return np.stack(columns, axis=1)


@dataclasses.dataclass(frozen=True)
class _Fit:
    """What every receiver's fit shares."""

    strata: np.ndarray
    usable: np.ndarray
    inside: np.ndarray
    grids: list
    block_of: np.ndarray
    roi_of: np.ndarray
    smooth: object
    n_boot: int
    max_value: float
    area: float


def _tissue_round(counts, signal, pairs, fit: _Fit, seed) -> list[dict]:
    """One pass of the lower-layer fits, every receiver: one dict per tested pair."""
    n = counts.shape[0]
    n_fixed = fit.strata.shape[1]
    n_rois = int(fit.roi_of.max()) + 1
    rng = np.random.default_rng(seed)
    found = []
    for j in range(n):
        sources = list(np.flatnonzero(pairs[:, j]))
        target = counts[j]
        dropped = {}
        while sources:
            design = np.hstack([fit.strata, signal[sources].T])
            coef, weights = _lower_layer_fit(design, target, smooth=fit.smooth, usable=fit.usable)
            slopes = coef[n_fixed:]
            # A negative slope is noise; one above max_value is co-occurring stain. Both
            # would distort the other slopes: drop the worst one and fit again.
            badness = np.maximum(-slopes, slopes - fit.max_value)
            if np.all(badness <= 0):
                break
            worst = int(np.argmax(badness))
            dropped[sources[worst]] = float(slopes[worst])
            del sources[worst]
        for k, slope in dropped.items():
            found.append({"source": k, "receiver": j, "estimate": slope, "se": np.inf,
                          "dropped": True, "level": np.nan, "scatter": np.nan,
                          "ring": np.nan,
                          "background": np.nan})
        if not sources:
            continue
        se = _block_bootstrap_se(design, target, weights, fit.block_of, fit.roi_of, n_rois,
                                 fit.n_boot, rng)[n_fixed:]
        # the receiver's fitted background in tissue, counts per pixel: the scale of confounding
        background = design[:, :n_fixed] @ coef[:n_fixed]
        inside = fit.inside if fit.inside.any() else fit.usable
        rate = float(np.median(background[inside])) / fit.area
        for c, (k, s, e) in enumerate(zip(sources, slopes, se, strict=True)):
            x = np.maximum(design[:, n_fixed + c], 0.0) / fit.area
            w = weights * fit.area  # weights are 1 / variance: per-bin information
            level = float(np.sum(w * x * x) / np.sum(w * x)) if np.sum(w * x) > 0 else 0.0
            found.append({"source": k, "receiver": j, "estimate": float(s), "se": float(e),
                          "dropped": False, "level": level, "background": rate,
                          "scatter": _scatter(design, target, coef, n_fixed + c, weights > 0),
                          "ring": _ring(design, target, coef, n_fixed + c, fit.usable, fit.grids)})
    return found


#: Tukey's biweight tuning constant (95 % efficiency at the normal; Beaton & Tukey 1974).
_BIWEIGHT_C = 4.685
#: Fewest bins with a visible ghost for the scatter check of :func:`_scatter`.
_SCATTER_BINS = 30


def _ring(design, target, coef, column, usable, grids) -> float:
    """The receiver around the source's ghost, as a share of the ghost (NaN when too few bins).

    Spillover stays in the source's own pixels: the bins next to those where the ghost
    shows, but holding no source signal, carry none of it. A receiver stain over the
    region the source lies in (a diffuse stromal stain under stromal cells) raises them
    as much. The median of the receiver less its fitted background and other sources over
    that ring of bins (one bin wide), over the median ghost where it shows: near 0 for
    spillover, about 1 or more for such a stain. A ring above the ghost by more than the
    biweight's cut-off (in Poisson standard deviations of the ghost's bins) is a bright
    stain of the receiver's own beside the source, which could not pass for the ghost
    under it: 0 is returned.
    """
    from scipy import ndimage

    fitted = design @ coef
    ghost = coef[column] * design[:, column]
    noise = np.sqrt(np.maximum(fitted - ghost, 1.0))
    visible = usable & (ghost >= noise)
    near, start = np.zeros(visible.shape, bool), 0
    for n_y, n_x in grids:
        stop = start + n_y * n_x
        near[start:stop] = ndimage.binary_dilation(visible[start:stop].reshape(n_y, n_x)).ravel()
        start = stop
    ring = near & usable & (ghost < 0.25 * noise)
    if visible.sum() < _SCATTER_BINS or ring.sum() < _SCATTER_BINS:
        return float("nan")
    rest = target - fitted + ghost
    level = float(np.median(rest[ring]))
    shown = float(np.median(ghost[visible]))
    if level > shown + _BIWEIGHT_C * float(np.median(np.sqrt(np.maximum(fitted[visible], 1.0)))):
        # a stain that bright under the source would put its bins beyond the biweight's
        # cut-off above the fitted line: it is the receiver's own bright stain beside the
        # source (rejected wherever it lies), and cannot pose as the ghost
        return 0.0
    return level / max(shown, 1e-12)


def _scatter(design, target, coef, column, used) -> float:
    """Robust scatter of the receiver around the fit over the bins the fit ``used`` where
    the source's ghost is visible, in Poisson standard deviations (about 1 for spillover;
    NaN when too few such bins).

    Spillover is a fixed share of the source: where the source is bright, the receiver's
    counts scatter around the fit by Poisson noise only. A receiver stain carried by the
    same cells, when the fit has taken it for the lower layer, varies from cell to cell
    independently of the source and scatters more: the median absolute deviation (scaled by 1.4826, a consistent estimate of the
    standard deviation for normal data; Rousseeuw & Croux, JASA 88:1273-1283, 1993) of
    the Pearson residuals over those bins measures it, unmoved by a minority of stained
    bins.
    """
    fitted = design @ coef
    ghost = coef[column] * design[:, column]
    noise = np.sqrt(np.maximum(fitted - ghost, 1.0))
    visible = used & (ghost >= 3.0 * noise)
    if visible.sum() < _SCATTER_BINS:
        return float("nan")
    r = (target[visible] - fitted[visible]) / np.sqrt(np.maximum(fitted[visible], 1.0))
    return float(1.4826 * np.median(np.abs(r - np.median(r))))




def _binned_tissue(rois, stains, bin_size, block, hot_ratio, hot_min_excess):
    """Per ROI: bin sums (C, bins) after hot-pixel restoration, each bin's bootstrap block,
    the ROI's bin grid and its background strata (:func:`.tissue_background.binned_background`)."""
    from ..io import Roi, read_roi
    from ..steps.hot_pixels import remove_hot_pixels

    if isinstance(rois, (str, Path, Roi)):
        rois = [rois]
    rois = [r if isinstance(r, Roi) else read_roi(r, stains=stains) for r in rois]
    if not rois:
        raise InputError("rois", "no ROI given")
    channels = rois[0].channels
    per_block = block // bin_size
    binned, blocks, grids, backgrounds = [], [], [], []
    for roi in rois:
        if set(roi.channels) != set(channels):
            raise InputError(roi.path, f"has other channels than {rois[0].path.name}")
        order = [roi.channels.index(c) for c in channels]
        n_y, n_x = roi.data.shape[1] // bin_size, roi.data.shape[2] // bin_size
        if n_y == 0 or n_x == 0:
            raise InputError(roi.path, f"smaller than one {bin_size} x {bin_size} bin")
        clean = np.empty((len(channels),) + tuple(roi.data.shape[1:]), np.float32)
        for c, k in enumerate(order):
            plane = np.asarray(roi.data[k], dtype=np.float32)
            clean[c] = np.asarray(remove_hot_pixels(plane, ratio=hot_ratio, min_excess=hot_min_excess).image)
        sums = np.stack([bin_sums(plane, bin_size) for plane in clean])
        backgrounds.append(binned_background(clean, bin_size))
        del clean
        rows, cols = np.divmod(np.arange(n_y * n_x), n_x)
        block_id = (rows // per_block) * (-(-n_x // per_block)) + cols // per_block
        offset = sum(int(t.max()) + 1 for t in blocks)
        binned.append(sums)
        blocks.append(block_id + offset)
        grids.append((n_y, n_x))
    return tuple(channels), binned, blocks, grids, backgrounds


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


def _lower_layer_fit(design, target, *, smooth=None, usable=None, tau: float = 0.1, c: float = 4.685,
                     iterations: int = 30):
    """Low-quantile start, then Tukey biweight on the lower layer (see estimate_from_tissue).

    The quantile regression (Koenker & Bassett 1978) is solved by iteratively reweighted
    least squares on residuals scaled by their Poisson standard deviation.
    """
    keep = np.ones(target.shape, bool) if usable is None else np.asarray(usable, bool)
    prior = keep.astype(np.float64)  # bins left out of the fit (tissue edge) get weight 0
    variance = np.maximum(target, 1.0)
    coef = _weighted_solve(design, target, prior / variance)
    for _ in range(iterations // 2):  # only a start: a rough quantile line is enough
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        e = (target - fitted) / np.sqrt(variance)
        asym = np.where(e > 0, tau, 1.0 - tau)
        new = _weighted_solve(design, target, prior * asym / (np.maximum(np.abs(e), 0.05) * variance))
        done = np.allclose(new, coef, rtol=1e-4, atol=1e-8)
        coef = new
        if done:
            break
    weights = prior / variance
    for _ in range(iterations):
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        r = (target - fitted) / np.sqrt(variance)
        below = -r[(r < 0) & keep]
        # Residuals are in Poisson standard deviations, so the noise scale is at least 1
        # (more where the background varies); a smaller estimate is discreteness at low
        # counts (mostly zeros), and trusting it would reject every informative block.
        scale = max(1.4826 * np.median(below) if below.size else 1.0, 1.0)
        weights = _biweight(r / (c * scale))
        if smooth is not None:
            # A stain covers neighbouring blocks, noise does not: the residual averaged over
            # the neighbourhood finds stained blocks whose own excess is within the noise.
            rs, floor = smooth(r)
            below = -rs[(rs < 0) & keep]
            scale_s = max(1.4826 * np.median(below) if below.size else 1.0, floor)
            weights = weights * _biweight(rs / (c * scale_s))
        weights = prior * weights / variance
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
