"""The excess test behind ``empty``: a Poisson model of background (+ ghosts) fitted to binned counts.

See the notes of :mod:`plexwash.qc.quality` (step 5 of how a channel is measured).
"""

from __future__ import annotations

import math
import threading

import numpy as np
from scipy import linalg, ndimage, special
from scipy.linalg import lapack

from ._box_kernels import agrees, box_fit, routines
from ._bvls import bounded_lstsq
from ._fit_kernels import excess_marks, kept_changes, one_row_fit, one_row_model
from ._kernels import box3_sums, largest_excess3, poisson_tail_verdicts
from .settings import QualitySettings

# Largest number of refits of the background / ghost model while leaving out bins.
_MAX_FIT_ROUNDS = 12


# Bins per block when Gram matrices are updated (bounds the temporary copies).
_GRAM_BLOCK = 8192


# The library routines the compiled box fit calls (None: the numpy form runs), checked
# against the numpy form at the first fit (:func:`_compiled_routines`).
_ROUTINES = routines()
_ROUTINES_CHECKED = False


def _compiled_routines():
    """:data:`_ROUTINES`, or None when the compiled box fit disagrees with the numpy form on
    the check systems (:func:`._box_kernels.agrees`; checked once per process)."""
    global _ROUTINES, _ROUTINES_CHECKED
    if not _ROUTINES_CHECKED:
        with _CHECK_LOCK:  # channels measured on threads: no thread uses them before the check ends
            if not _ROUTINES_CHECKED:
                if _ROUTINES is not None and not (agrees(_ROUTINES, _box_least_squares_numpy)
                                                  and _one_row_agrees(_ROUTINES)):
                    _ROUTINES = None
                _ROUTINES_CHECKED = True
    return _ROUTINES


_CHECK_LOCK = threading.Lock()


def _one_row_agrees(fn, count: int = 6) -> bool:
    """Whether the compiled one-row fit gives :func:`_fit_one_row_numpy`'s bits on ``count``
    small channels with a stain (bins leave and join between rounds)."""
    settings = QualitySettings()
    rng = np.random.default_rng(20261207)
    for t in range(count):
        area = np.full((6 + t, 9), 16.0)
        area[-1] = 8.0
        bins = rng.poisson(0.5 * (1 + t) * area).astype(np.float64)
        bins[:2] += rng.poisson(40.0, (2, 9))
        design = area.ravel()[None, :]
        ours = _fit_one_row_compiled(bins.ravel(), design, np.inf, settings, fn)
        ref = _fit_one_row_numpy(bins.ravel(), design, np.inf, settings)
        if ours is not None and any(a.tobytes() != b.tobytes()
                                    for a, b in zip(ours, ref, strict=True)):
            return False
    return True


def poisson_tail_below(n: np.ndarray, mu: np.ndarray, alpha: float) -> np.ndarray:
    """Where ``P(N >= n) < alpha`` for N ~ Poisson(mu) (``alpha`` below 0.159).

    ``P(N >= n)`` is the regularised lower incomplete gamma ``P(n, mu)``
    (``scipy.special.gammainc``), which interpolates smoothly for non-integer counts
    (compensated data). Only the bins the answer is not obvious for pay for it:

    * ``n <= mu + sqrt(mu)``: ``P >= 0.159 > alpha`` (checked numerically for
      1e-3 <= mu <= 1e5), so not below;
    * the Chernoff bound ``P(n, mu) <= exp(-(n log(n / mu) - n + mu))`` for ``n > mu``
      (the lower tail of a Gamma(n) variable; it holds for non-integer n too) is
      already below ``alpha``: below. These are the bright bins of a stain, most of
      a stained channel's bins;
    * the series ``P(n, mu) = mu^n e^-mu / Gamma(n + 1) * (1 + mu / (n + 1) + mu^2 /
      ((n + 1)(n + 2)) + ...)`` (Abramowitz & Stegun 6.5.29), cut after three terms, is a
      lower bound; where it is at least ``alpha``: not below. These are the background
      bins that fluctuate up;
    * the rest: the same series summed further, with a bound on what it leaves out, and
      ``gammainc`` itself where the answer is within rounding of ``alpha``
      (:func:`._kernels.poisson_tail_verdicts`).

    The answer is that of ``gammainc(n, mu) < alpha`` everywhere (the bounds keep a
    margin far above their rounding).
    """
    n = np.ascontiguousarray(n, dtype=np.float64)
    if not (isinstance(mu, np.ndarray) and mu.shape == n.shape):
        mu = np.broadcast_to(mu, n.shape)
    mu = np.ascontiguousarray(mu, dtype=np.float64)
    out = np.empty(n.shape, bool)
    flat_n, flat_mu, flat_out = n.reshape(-1), mu.reshape(-1), out.reshape(-1)
    hard = np.empty(flat_n.size, np.intp)
    count = poisson_tail_verdicts(flat_n, flat_mu, math.log(alpha), flat_out, hard)
    if count:
        index = hard[:count]
        flat_out[index] = special.gammainc(flat_n[index], flat_mu[index]) < alpha
    return out


def fit_model(target: np.ndarray, design: np.ndarray, upper: np.ndarray,
               settings: QualitySettings, *, gram: np.ndarray | None = None,
               cross: np.ndarray | None = None, n_background: int = 1,
               wide: WideDesign | None = None):
    """Fit target ~ design.T @ coef, leaving out bins the model cannot explain.

    ``design`` row 0 holds the bins' areas (its coefficient is the background per
    pixel, >= 0, unbounded above; with ``n_background`` rows, each holds the bins' pixels
    of one region, e.g. glass and tissue, with a rate of its own), the other rows the
    sources (coefficients
    ``0 <= s_i <= upper_i``; an upper bound of 0 leaves a row out). Least squares on
    the bins kept; bins with ``P(N >= n | mu) < fit_alpha`` (counts ``n`` and
    ``mu`` = values times ``counts_per_unit``) are left out and the fit repeated
    until the set is stable. ``gram`` / ``cross`` (``design @ design.T`` and
    ``design @ target`` over all bins) may be passed precomputed; between rounds
    they are updated with the bins that changed side only. ``wide`` (:class:`WideDesign`
    of ``design``) holds the float64 copies the rounds would otherwise convert again.

    Returns mu (model counts per bin, floored), the coefficients (in the data's
    units) and the mask of bins kept.
    """
    if (design.shape[0] == 1 and wide is None and n_background == 1
            and design.dtype == np.float64 and upper.shape == (1,)):
        return _fit_one_row(target, design, float(upper[0]), settings, gram=gram, cross=cross)
    return _fit_rows(target, design, upper, settings, gram=gram, cross=cross,
                     n_background=n_background, wide=wide)


def _fit_rows(target, design, upper, settings, *, gram=None, cross=None, n_background=1,
              wide=None):
    """:func:`fit_model`'s rounds for any design: each round's box fit and model counts by
    numpy and LAPACK, the bins that change side found in one compiled pass
    (:func:`_round_changes`), the Gram matrix updated by :func:`_partial_gram` (the steps
    of the plain numpy rounds, which the tests keep as the reference)."""
    unit = settings.counts_per_unit
    if gram is None:
        gram = gram_matrix(design)
        cross = _cross(design, target)
    n = target * unit
    if wide is None:
        floor = design[:n_background].astype(np.float64).sum(axis=0)
    else:
        floor = wide.whole[:n_background].sum(axis=0)
    floor = settings.background_floor * unit * floor
    work = _RoundWork(n, settings.fit_alpha)
    kept = np.ones(n.shape, bool)
    lower = np.zeros(design.shape[0])
    rows = design if wide is None else wide.whole
    g, h = gram, cross
    for _ in range(_MAX_FIT_ROUNDS):
        coef = _box_least_squares(g, h, lower, upper)
        mu = np.maximum(unit * combine_rows(coef, design, wide), floor)
        n_kept, left, joined = work.changes(mu, kept)
        if n_kept == 0 or (left.size == 0 and joined.size == 0):
            break
        g, h = _moved_index(g, h, rows, target, left, joined)
        kept = ~work.below
    return mu, coef, kept


class _RoundWork:
    """The buffers of one fit's rounds and the step they share: which bins the new model
    leaves out (``poisson_tail_below`` of the counts, into ``below``) and which bins change
    side against ``kept`` (ascending indices, as ``nonzero`` lists them)."""

    def __init__(self, n: np.ndarray, alpha: float):
        self.n = np.ascontiguousarray(n, dtype=np.float64).reshape(-1)
        size = self.n.size
        self.alpha, self.log_alpha = alpha, math.log(alpha)
        self.below = np.empty(size, bool)
        self.hard = np.empty(size, np.intp)
        self.left, self.joined = np.empty(size, np.intp), np.empty(size, np.intp)

    def changes(self, mu: np.ndarray, kept: np.ndarray):
        """(bins kept by the new model, indices that leave, indices that join)."""
        count = poisson_tail_verdicts(self.n, mu, self.log_alpha, self.below, self.hard)
        if count:
            index = self.hard[:count]
            self.below[index] = special.gammainc(self.n[index], mu[index]) < self.alpha
        n_kept, n_left, n_joined = kept_changes(kept, self.below, self.left, self.joined)
        return n_kept, self.left[:n_left], self.joined[:n_joined]


def _fit_one_row(target, design, upper, settings, *, gram=None, cross=None):
    """:func:`_fit_one_row_numpy` by one compiled call (:func:`._fit_kernels.one_row_fit`:
    the same operations, the moved bins' sums by numpy's ``ddot``); the numpy form where
    it hands back (a round leaving bins to ``gammainc``) or the routines are missing."""
    fn = _compiled_routines()
    found = None if fn is None else _fit_one_row_compiled(target, design, upper, settings, fn,
                                                          gram=gram, cross=cross)
    if found is None:
        return _fit_one_row_numpy(target, design, upper, settings, gram=gram, cross=cross)
    return found


def _fit_one_row_compiled(target, design, upper, settings, fn, *, gram=None, cross=None):
    """(mu, coef, kept) of :func:`._fit_kernels.one_row_fit`, or None where it hands back."""
    if target.dtype != np.float64 or target.shape != (design.shape[1],):
        return None
    unit = settings.counts_per_unit
    g, h = _one_row_sums(design, target) if gram is None else (float(gram[0, 0]),
                                                               float(cross[0]))
    n = np.ascontiguousarray(target * unit, dtype=np.float64).reshape(-1)  # as _RoundWork
    size = n.size
    mu, coef = np.empty(size), np.zeros(1)
    below, kept = np.empty(size, bool), np.empty(size, bool)
    hard, left, joined = (np.empty(size, np.intp) for _ in range(3))
    status = one_row_fit(np.ascontiguousarray(design[0]), np.ascontiguousarray(target), n,
                         g, h, upper, unit, settings.background_floor * unit,
                         math.log(settings.fit_alpha), _MAX_FIT_ROUNDS, _GRAM_BLOCK, fn, mu,
                         below, hard, left, joined, kept, coef)
    return (mu, coef, kept) if status == 0 else None


def _one_row_sums(design, target):
    """gram_matrix and _cross of a one-row design, a block at a time (0.0 + each block's
    product), as Python floats."""
    g = h = 0.0
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        d = design[:, start:start + _GRAM_BLOCK].astype(np.float64)
        g += float((d @ d.T)[0, 0])
        h += float((d @ target[start:start + _GRAM_BLOCK])[0])
    return g, h


def _fit_one_row_numpy(target, design, upper, settings, *, gram=None, cross=None):
    """:func:`_fit_rows` of a one-row float64 design (the flat background of one channel):
    the same operations on the same values, bit for bit, with the 1 x 1 Gram matrix and
    its cross term as Python floats (the same IEEE operations as numpy's 1-element arrays),
    the model counts and the bins that change side found by compiled loops
    (:func:`._kernels.one_row_model`, :func:`._kernels.kept_changes`), and the Gram sums
    of the moved bins by the same numpy products as :func:`_partial_gram`."""
    unit = settings.counts_per_unit
    if gram is None:  # gram_matrix and _cross, a block at a time (0.0 + each block's product)
        g, h = _one_row_sums(design, target)
    else:
        g, h = float(gram[0, 0]), float(cross[0])
    n = target * unit
    row = np.ascontiguousarray(design[0])
    # the floor: the sum over the one background row is that row (numpy's reduction of
    # one item is the item), times background_floor * unit (in one_row_model)
    floor_scale = settings.background_floor * unit
    work = _RoundWork(n, settings.fit_alpha)
    kept = np.ones(work.n.size, bool)
    coef = np.zeros(1)
    mu = np.empty(work.n.size)
    for _ in range(_MAX_FIT_ROUNDS):
        # _box_least_squares of one unknown, lower bound 0
        coef = np.zeros(1)
        if upper > 0.0 and g > 0.0:
            _one_unknown(g, h, 0.0, upper, coef)
        mu = np.empty(work.n.size)
        one_row_model(row, float(coef[0]), unit, floor_scale, mu)
        n_kept, left, joined = work.changes(mu, kept)
        if n_kept == 0 or (left.size == 0 and joined.size == 0):
            break
        if left.size:
            g_out, h_out = _partial_sums(design, target, left)
            g, h = g - g_out, h - h_out
        if joined.size:
            g_in, h_in = _partial_sums(design, target, joined)
            g, h = g + g_in, h + h_in
        else:
            g, h = g + 0.0, h + 0.0
        kept = ~work.below
    return mu, coef, kept


def _partial_sums(design, target, index):
    """:func:`_partial_gram` of a one-row design, as Python floats (the same products and sums)."""
    g = h = 0.0
    for start in range(0, index.size, _GRAM_BLOCK):
        part = index[start:start + _GRAM_BLOCK]
        d = design[:, part].astype(np.float64, copy=False)
        g += float((d @ d.T)[0, 0])
        h += float((d @ target[part])[0])
    return g, h


def gram_matrix(design: np.ndarray) -> np.ndarray:
    """``D D^T`` in float64, a block of bins (columns) at a time."""
    g = np.zeros((design.shape[0], design.shape[0]))
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        d = design[:, start:start + _GRAM_BLOCK].astype(np.float64)
        g += d @ d.T
    return g


def _cross(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """``D t`` in float64, a block of bins at a time."""
    h = np.zeros(design.shape[0])
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        h += design[:, start:start + _GRAM_BLOCK].astype(np.float64) @ target[start:start + _GRAM_BLOCK]
    return h


def combine_rows(coef: np.ndarray, design: np.ndarray, wide: WideDesign | None = None) -> np.ndarray:
    """``coef @ design`` in float64, a block of columns at a time (no float64 copy of ``design``).

    With ``wide`` (:class:`WideDesign` of ``design``) its float64 blocks are multiplied: the
    same arrays the conversion makes, so the same products.
    """
    out = np.empty(design.shape[1])
    if wide is not None:
        for start, block in zip(range(0, design.shape[1], _GRAM_BLOCK), wide.blocks, strict=True):
            out[start:start + _GRAM_BLOCK] = coef @ block
        return out
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        out[start:start + _GRAM_BLOCK] = coef @ design[:, start:start + _GRAM_BLOCK].astype(np.float64)
    return out


#: Largest float64 copies of a design :class:`WideDesign` keeps (the whole and its blocks).
WIDE_DESIGN_BYTES = 64 * 2**20


class WideDesign:
    """A float32 design in float64, kept for the many fits of one ROI that share it.

    ``whole`` is ``design.astype(float64)`` (the bins moved between rounds are gathered from
    it, the values the conversion of the gathered float32 columns gives); ``blocks`` are its
    column blocks as :func:`combine_rows` converts them, each C-contiguous. :meth:`of` gives
    None when the copies would exceed ``WIDE_DESIGN_BYTES`` (the fits then convert as they go).
    """

    def __init__(self, design: np.ndarray):
        self.whole = design.astype(np.float64)
        self.blocks = [np.ascontiguousarray(self.whole[:, start:start + _GRAM_BLOCK])
                       for start in range(0, design.shape[1], _GRAM_BLOCK)]

    @classmethod
    def of(cls, design: np.ndarray) -> WideDesign | None:
        return cls(design) if 16 * design.size <= WIDE_DESIGN_BYTES else None


def _moved_bins(g, h, design, target, left, joined):
    """``g - G(left) + G(joined)``, ``h - H(left) + H(joined)`` (:func:`_partial_gram`) for
    boolean masks of the bins (:func:`_moved_index`)."""
    return _moved_index(g, h, design, target, left.nonzero()[0], joined.nonzero()[0])


def _moved_index(g, h, design, target, index_out, index_in):
    """:func:`_moved_bins` of the bins' indices (ascending).

    A side no bin moved to contributes zeros, so its product is not formed (``+ 0.0``
    keeps what adding those zeros does to a -0.0).
    """
    if index_out.size:
        g_out, h_out = _partial_gram(design, target, index_out)
        g, h = g - g_out, h - h_out
    if index_in.size:
        g_in, h_in = _partial_gram(design, target, index_in)
        return g + g_in, h + h_in
    return g + 0.0, h + 0.0


def _partial_gram(design: np.ndarray, target: np.ndarray, index: np.ndarray):
    """``D D^T`` and ``D t`` over the bins ``index``, a block of bins at a time."""
    g = np.zeros((design.shape[0], design.shape[0]))
    h = np.zeros(design.shape[0])
    for start in range(0, index.size, _GRAM_BLOCK):
        part = index[start:start + _GRAM_BLOCK]
        d = design[:, part].astype(np.float64, copy=False)  # a gathered copy already
        g += d @ d.T
        h += d @ target[part]
    return g, h


def _box_least_squares(gram: np.ndarray, cross: np.ndarray, lower: np.ndarray,
                       upper: np.ndarray) -> np.ndarray:
    """:func:`_box_least_squares_numpy` by one compiled call (:func:`._box_kernels.box_fit`,
    the same library routines on the same values), the numpy form where it hands back."""
    fn = _compiled_routines()
    if (fn is not None and gram.dtype == cross.dtype == lower.dtype == upper.dtype
            == np.float64 and gram.ndim == 2 and cross.ndim == lower.ndim == upper.ndim == 1
            and gram.shape == (cross.size, cross.size) == (lower.size, upper.size)):
        coef = np.empty(cross.size)
        # C-contiguous copies (the same values): one compiled specialisation to load
        args = (np.ascontiguousarray(v) for v in (gram, cross, lower, upper))
        if box_fit(*args, fn, coef) == 0:
            return coef
    return _box_least_squares_numpy(gram, cross, lower, upper)


def _box_least_squares_numpy(gram: np.ndarray, cross: np.ndarray, lower: np.ndarray,
                             upper: np.ndarray) -> np.ndarray:
    """argmin c^T G c - 2 c^T h subject to lower <= c <= upper (G = D D^T, h = D n).

    Variables with ``upper <= lower`` are fixed at ``lower``; the others are
    solved as the equivalent bounded least-squares problem ||L^T c - L^-1 h||
    (G = L L^T) with BVLS (:func:`._bvls.bounded_lstsq`, the answer of
    ``scipy.optimize.lsq_linear(method="bvls")`` to the bit), on a diagonally scaled
    G with a tiny ridge so that dependent or all-zero sources do no harm. The
    factorisation and triangular solve are LAPACK's ``dpotrf`` / ``dtrtrs``, called as
    ``scipy.linalg.cholesky`` / ``solve_triangular`` call them, without their checks.
    """
    coef = lower.astype(np.float64)
    diagonal = gram.diagonal()
    free = (upper > lower) & (diagonal > 0)
    idx = free.nonzero()[0]  # 1-D: np.flatnonzero
    if idx.size == 0:
        return coef
    if idx.size == 1 == free.size:
        return _one_unknown(float(gram[0, 0]), float(cross[0]), float(lower[0]), float(upper[0]), coef)
    if idx.size == free.size:  # nothing fixed: the fixed part of h is an empty product (+0)
        h = cross - 0.0
        g = gram.copy()
    else:
        fixed = (~free).nonzero()[0]
        rows = idx[:, None]  # gram[np.ix_(idx, ...)], without its Python steps
        h = cross[idx] - gram[rows, fixed[None, :]] @ coef[fixed]
        g = gram[rows, idx[None, :]]
    scale = np.sqrt(diagonal[idx])
    g /= scale[:, None] * scale  # np.outer(scale, scale)
    g.flat[::idx.size + 1] += 1e-9
    h = h / scale
    lo = lower[idx] * scale
    hi = upper[idx] * scale
    if idx.size == 1:  # one unknown: clip the unconstrained minimum
        coef[idx] = np.clip(h / g[0, 0], lo, hi) / scale
        return coef
    chol, info = lapack.dpotrf(g, lower=1, clean=1)
    if info == 0:
        design = chol.T
        rhs, info = lapack.dtrtrs(chol, h, lower=1)
    if info != 0:
        # G built from sums can come out very slightly indefinite (rounding): use its
        # eigen-decomposition with the eigenvalues floored at the ridge instead
        w, v = linalg.eigh((g + g.T) / 2)
        root = np.sqrt(np.maximum(w, 1e-9))
        design, rhs = (v * root).T, (v.T @ h) / root
    coef[idx] = bounded_lstsq(design, rhs, lo, hi) / scale
    return coef


def _one_unknown(gram: float, cross: float, lower: float, upper: float,
                 coef: np.ndarray) -> np.ndarray:
    """:func:`_box_least_squares` of one unknown in Python floats (the same IEEE operations).

    ``np.clip`` is ``min(max(x, lo), hi)`` with numpy's ``a > b ? a : b`` (so ``max(-0.0,
    0.0)`` is ``0.0``); a NaN goes through numpy itself.
    """
    scale = math.sqrt(gram)
    g = gram / (scale * scale) + 1e-9
    x = (cross / scale) / g
    lo, hi = lower * scale, upper * scale
    if math.isnan(x) or math.isnan(lo) or math.isnan(hi):
        x = float(np.clip(np.float64(x), lo, hi))
    else:
        x = x if x > lo else lo
        x = x if x < hi else hi
    coef[0] = x / scale
    return coef


def measure_excess_area(n: np.ndarray, mu: np.ndarray, area: np.ndarray,
                 settings: QualitySettings) -> float:
    """Pixels of the bins with excess over the model, judged per bin and per 3 x 3 bins.

    The window test adds power for faint stains spread over several bins; the
    largest single-bin excess in a window is left out of it, so one stray bright
    bin (a hot pixel that escaped) cannot lend excess to its eight neighbours.
    """
    given = n, mu, area
    n, mu, area = (np.ascontiguousarray(v, dtype=np.float64) for v in given)
    if (all(np.asarray(v).dtype == np.float64 for v in given) and n.ndim == 2
            and n.shape == mu.shape == area.shape and n.size
            and np.isfinite(n).all() and np.isfinite(mu).all() and np.isfinite(area).all()):
        # one compiled pass over the bins and their windows (the same values, the same
        # verdicts); gammainc only for what the bounds leave open
        unit = settings.counts_per_unit
        windows = min(n.shape) >= 3
        n_w, mu_w, a_w = (np.empty(n.shape) for _ in range(3))
        mark = np.empty(n.shape, np.int8)
        hard = np.empty(2 * n.size, np.intp)
        count = excess_marks(n, mu, area, settings.min_excess * unit,
                             math.log(settings.empty_alpha), windows, n_w, mu_w, a_w, mark, hard)
        if count:
            index = hard[:count]
            pool_n = np.concatenate([n.reshape(-1), n_w.reshape(-1)])
            pool_mu = np.concatenate([mu.reshape(-1), mu_w.reshape(-1)])
            below = special.gammainc(pool_n[index], pool_mu[index]) < settings.empty_alpha
            mark.reshape(-1)[index[below] % n.size] = 1
        return float(area[mark.view(bool)].sum())
    return _measure_excess_area_numpy(*given, settings)


def _measure_excess_area_numpy(n: np.ndarray, mu: np.ndarray, area: np.ndarray,
                               settings: QualitySettings) -> float:
    """:func:`measure_excess_area` in numpy steps (for values that are not finite, and the
    form the compiled pass is tested against)."""
    unit = settings.counts_per_unit
    excess = poisson_tail_below(n, mu, settings.empty_alpha) & (
        n - mu >= settings.min_excess * unit * area)
    if min(n.shape) >= 3:
        n_w, mu_w, a_w = window_sums(n, mu, area)
        excess |= poisson_tail_below(n_w, mu_w, settings.empty_alpha) & (
            n_w - mu_w >= settings.min_excess * unit * a_w)
    return float(area[excess].sum())


def window_sums(n: np.ndarray, mu: np.ndarray, area: np.ndarray):
    """The 3 x 3-bin sums of :func:`measure_excess_area`'s window test.

    ``n_w`` (less the window's largest single-bin excess, floored at 0), ``mu_w`` and
    ``a_w``: ``scipy.ndimage.uniform_filter(v, 3, mode="constant") * 9`` and
    ``maximum_filter(n - mu, 3, mode="constant")``, by compiled kernels with scipy's steps
    (:func:`._kernels.box3_sums`, :func:`._kernels.largest_excess3`); scipy itself where a
    value is not finite.
    """
    n, mu, area = (np.ascontiguousarray(v, dtype=np.float64) for v in (n, mu, area))
    if not (np.isfinite(n).all() and np.isfinite(mu).all() and np.isfinite(area).all()):
        n_w, mu_w, a_w = (ndimage.uniform_filter(v, 3, mode="constant") * 9 for v in (n, mu, area))
        largest = ndimage.maximum_filter(n - mu, 3, mode="constant", cval=0.0)
        return n_w - np.maximum(largest, 0.0), mu_w, a_w
    n_w, mu_w, a_w, largest = (np.empty(n.shape) for _ in range(4))
    for v, out in ((n, n_w), (mu, mu_w), (area, a_w)):
        box3_sums(v, out)
    largest_excess3(n, mu, largest)
    n_w -= largest
    return n_w, mu_w, a_w
