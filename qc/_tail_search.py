"""Exact shortcuts of the background model's tests (:mod:`plexwash.qc.background`): the same
decisions as the plain computations, made with less of them.

- :class:`TailSearch`: one step of the lower-tail scale bisection, decided by counting and,
  only when that cannot decide, by numpy's own quantile arithmetic.
- :func:`tail_below`: the Poisson tail of a window compared with its cut, the incomplete gamma
  function evaluated only where two bounds do not decide.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import special


def search_kernels():
    """The compiled loops (``plexwash.qc.steps._search_kernels``), imported on first use (numba
    stays out of the commands that never wash) by its absolute name (one numba cache), then
    kept in a module global: a hot path calls this per channel. The global is set only once
    the import has finished; ``sys.modules`` holds a module from the moment its import starts,
    so a second thread reading it from there could get it half initialised (the import
    statement instead waits for another thread's import of the same module to end)."""
    global _kernels
    if _kernels is None:
        from plexwash.qc.steps import _search_kernels as kernels

        _kernels = kernels
    return _kernels


_kernels = None


def tail_below(n: np.ndarray, mu: np.ndarray, alpha: float, upper_tail) -> np.ndarray:
    """``upper_tail(n, mu) < alpha`` (``upper_tail``: :func:`plexwash.qc.background.poisson_upper_tail`) for whole counts ``n > mu > 0``, the incomplete gamma
    function evaluated only where two bounds on the tail do not decide.

    With ``p = P(N = n)``, ``p <= P(N >= n) <= p / (1 - mu / (n + 1))`` (the terms after ``n``
    fall at least geometrically by ``mu / (n + 1)``; Johnson, Kemp and Kotz, Univariate
    Discrete Distributions, 3rd ed., ch. 4). ``log p`` is computed to far better than the
    ``1e-6`` kept on either side of ``log alpha``, so where a bound decides, the tail computed
    by ``special.gammainc`` (relative error far below ``1e-6``) decides alike; elsewhere (and
    for counts or means above ``1e7``, or not whole) the tail is computed.

    The bounds are one compiled pass (``steps._search_kernels.tail_bounds``; ``log p`` there
    from the C library's ``lgamma``, ``log`` and ``log1p``, as exact as numpy's and scipy's to
    far better than the ``1e-6`` margin, so where either decides it decides as the tail does);
    the tail is then computed on the pixels left open only.
    """
    n = np.ascontiguousarray(n, np.float64)
    mu = np.ascontiguousarray(mu, np.float64)
    if n.shape != mu.shape:
        n, mu = (np.ascontiguousarray(a) for a in np.broadcast_arrays(n, mu))
    out = np.zeros(n.shape, bool)
    undecided = np.empty(n.size, np.int64)
    left = search_kernels().tail_bounds(n.reshape(-1), mu.reshape(-1), float(np.log(alpha)), _log_factorials(),
                                        out.reshape(-1), undecided)
    if left:
        at = undecided[:left]
        out.reshape(-1)[at] = upper_tail(n.reshape(-1)[at], mu.reshape(-1)[at]) < alpha
    return out


@functools.cache
def _log_factorials() -> np.ndarray:
    """``lgamma(k + 1)`` for the counts ``k`` below :data:`FACTORIALS`, made once by the compiled
    loops' own ``lgamma`` (read-only)."""
    table = np.empty(FACTORIALS, np.float64)
    search_kernels().log_factorials(table)
    table.flags.writeable = False
    return table


#: Whole counts whose ``lgamma(k + 1)`` :func:`tail_below` looks up (32 KiB).
FACTORIALS = 4096


def tail_below_numpy(n: np.ndarray, mu: np.ndarray, alpha: float, upper_tail) -> np.ndarray:
    """:func:`tail_below` with the bounds computed by numpy on whole arrays (the form the
    compiled bounds replaced; the tests keep it as their reference)."""
    n = np.asarray(n, np.float64)
    mu = np.asarray(mu, np.float64)
    out = np.zeros(n.shape, bool)
    boundable = (n < 1e7) & (mu < 1e7) & (mu > 1e-300) & (n >= 1.0) & (n > mu) & (n == np.floor(n))
    log_alpha = float(np.log(alpha))
    nb, mb = n[boundable], mu[boundable]
    log_p = nb * np.log(mb) - mb - special.gammaln(nb + 1.0)
    probable = log_p > log_alpha + 1e-6
    improbable = (log_p - np.log1p(-mb / (nb + 1.0))) < log_alpha - 1e-6
    undecided = ~boundable
    undecided[boundable] = ~(probable | improbable)
    out[boundable] = improbable & ~probable
    out[undecided] = upper_tail(n[undecided], mu[undecided]) < alpha
    return out


class TailSearch:
    """``np.quantile((n - s m) / sqrt(s m), q) > target`` for the bisection of
    :func:`plexwash.qc.background.lower_tail_scale`, decided exactly and without sorting where it can be.

    The quantile is numpy's default (linear) one: order statistics ``j = floor((N - 1) q)`` and
    ``j + 1`` interpolated as ``numpy.lib._function_base_impl._lerp`` does, and the result lies
    between them. So when at most ``j`` values are ``<= target`` the quantile is above it, when
    more than ``j + 1`` are it is not, and only otherwise are both order statistics selected and
    interpolated, with numpy's arithmetic. Each value is computed by the same elementwise
    operations as on the whole array, so the decisions equal numpy's.

    The values, count and selection of a step are one compiled loop (``steps._search_kernels.tail_decision``:
    the same operations, element by element, as numpy's); :meth:`bisect` runs all the steps in one.
    """

    @staticmethod
    def usable(n: np.ndarray, m: np.ndarray) -> bool:
        """Finite counts and weights bounded away from 0 (every value finite, no NaN)."""
        return bool(np.isfinite(n).all() and np.isfinite(m).all() and m.min() > 1e-200)

    def __init__(self, n: np.ndarray, m: np.ndarray, quantile: float):
        self.n, self.m = n, m
        virtual = (n.size - 1) * quantile
        if virtual >= n.size - 1:  # numpy takes the largest value
            self.first = self.second = n.size - 1
            self.gamma = 0.0
        else:
            below = np.floor(virtual)
            self.first, self.second = int(below), int(below) + 1
            self.gamma = float(virtual - below)
        self._buffer = None
        self._kernels = search_kernels()

    def above(self, s, target: float) -> bool:
        if self._buffer is None or self._buffer.size < self.n.size:
            self._buffer = np.empty(self.n.size, np.float64)
        code, a, b = self._kernels.tail_decision(self.n, self.m, float(s), float(target), self.first, self.second,
                                                      self._buffer)
        if code < 2:
            return code == 1
        diff = b - a
        value = b - diff * (1 - self.gamma) if self.gamma >= 0.5 else a + diff * self.gamma
        return value > target

    def bisect(self, low: float, high: float, target: float, steps: int) -> tuple[float, float]:
        """``steps`` halvings of ``[low, high]`` (log scale) by :meth:`above` at ``exp(mid)``, in one
        compiled loop (``steps._search_kernels.tail_bisection``): the same
        ``(low, high)`` as the loop of :func:`plexwash.qc.background.lower_tail_scale`.

        The loop's ``exp`` (the C library's) differs from numpy's in the last bit for a few
        percent of arguments, so every step's scale is checked against ``np.exp`` of its mid.
        Where they differ, that step is decided again at numpy's scale (:meth:`above`); when the
        decision stands, the later steps are unchanged (each mid depends on the decisions before
        it alone), otherwise the loop resumes from that step's bracket with numpy's scale."""
        mids, scales = np.empty(steps, np.float64), np.empty(steps, np.float64)
        bounds = np.empty((steps, 2), np.float64)
        decisions = np.empty(steps, np.bool_)
        buffer = np.empty(self.n.size, np.float64)
        start, scale, checked = 0, 0.0, 0
        while True:
            end = self._kernels.tail_bisection(self.n, self.m, float(low), float(high), float(target), self.first,
                                               self.second, self.gamma, start, scale, buffer, mids, scales, bounds,
                                               decisions)
            exact = np.exp(mids)
            for k in checked + np.flatnonzero(exact[checked:] != scales[checked:]):
                if self.above(exact[k], target) != decisions[k]:
                    start, scale, checked = int(k), float(exact[k]), int(k) + 1
                    low, high = bounds[k]
                    break
            else:
                return end
