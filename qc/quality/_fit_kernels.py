"""Compiled kernels of the excess test's fits and of Otsu's threshold (numba).

Each reproduces the numpy, scipy or scikit-image steps it stands for to the bit (the
tests compare them); they release the GIL (``nogil``) and are cached on disk
(``cache=True``). The Poisson tail bounds and the 3 x 3 window sums are
:mod:`._kernels`'s.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from ._box_kernels import _DDOT, _call_ddot
from ._kernels import _tail_verdict, box3_sums, largest_excess3, poisson_tail_verdicts


@nb.njit(cache=True, nogil=True)
def one_row_model(row, coef, unit, floor_scale, out):
    """``out = np.maximum(unit * (coef * row), floor_scale * row)``: the model counts of a
    one-row design.

    ``coef * row`` is the product ``combine_rows`` forms for one row (a sum of one product);
    the maximum is numpy's (``a >= b or a is NaN ? a : b``)."""
    for i in range(row.size):
        v = unit * (coef * row[i])
        f = floor_scale * row[i]
        out[i] = v if (v >= f or v != v) else f


@nb.njit(cache=True, nogil=True)
def kept_changes(kept, below, left, joined):
    """Bins kept that ``below`` leaves out (into ``left``) and bins not kept that it keeps
    (into ``joined``); returns (bins it keeps, count left, count joined)."""
    n_kept = 0
    n_left = 0
    n_joined = 0
    for i in range(kept.size):
        keep = not below[i]
        if keep:
            n_kept += 1
        if kept[i] and not keep:
            left[n_left] = i
            n_left += 1
        elif keep and not kept[i]:
            joined[n_joined] = i
            n_joined += 1
    return n_kept, n_left, n_joined


@nb.njit(cache=True, nogil=True)
def _mark_excess(n, mu, area, scale, log_alpha, offset, mark, hard, count):
    """Bins with ``n - mu >= scale * area`` and ``P(N >= n) < alpha`` marked 1 in ``mark``
    (left as they are otherwise); the undecided ones' indices plus ``offset`` added to
    ``hard`` from ``count`` on. Returns the new count."""
    for i in range(n.size):
        if mark[i] or not (n[i] - mu[i] >= scale * area[i]):
            continue
        verdict = _tail_verdict(n[i], mu[i], log_alpha)
        if verdict == 1:
            mark[i] = 1
        elif verdict == 2:
            hard[count] = i + offset
            count += 1
    return count


@nb.njit(cache=True, nogil=True)
def excess_marks(n, mu, area, scale, log_alpha, windows, n_w, mu_w, a_w, mark, hard):
    """The excess test of ``excess.measure_excess_area`` over (Y, X) float64 bins, finite.

    ``mark`` (int8, zeroed here) = 1 where a bin, or its 3 x 3 window (with ``windows``:
    ``n_w``, ``mu_w``, ``a_w`` filled as ``excess.window_sums`` makes them), holds more than
    ``scale`` counts per pixel above the model and the Poisson tail bounds
    (:func:`_tail_verdict`) put it below alpha. A bin whose own test needs ``gammainc`` goes
    to ``hard`` as its flat index, a window's as its index plus ``n.size``; returns their
    count. The tail is judged only where the excess is large enough (the test is an and).
    """
    flat_n, flat_mu, flat_a = n.reshape(-1), mu.reshape(-1), area.reshape(-1)
    flat_mark = mark.reshape(-1)
    flat_mark[:] = 0
    count = _mark_excess(flat_n, flat_mu, flat_a, scale, log_alpha, 0, flat_mark, hard, 0)
    if windows:
        box3_sums(n, n_w)
        box3_sums(mu, mu_w)
        box3_sums(area, a_w)
        largest = np.empty(n.shape)
        largest_excess3(n, mu, largest)
        for y in range(n.shape[0]):
            for x in range(n.shape[1]):
                n_w[y, x] -= largest[y, x]
        count = _mark_excess(n_w.reshape(-1), mu_w.reshape(-1), a_w.reshape(-1), scale,
                             log_alpha, n.size, flat_mark, hard, count)
    return count


@nb.njit(cache=True, nogil=True)
def otsu_index(counts, centers):
    """The index into ``centers`` of ``skimage.filters.threshold_otsu(hist=(counts, centers))``
    (scikit-image 0.26), by its steps: the histogram's empty ends trimmed, the counts in
    float32, the class weights and means as its sequential ``cumsum`` forms them, the
    between-class variance ``w1 * w2 * (m1 - m2) ** 2`` and numpy's ``argmax`` (the first
    largest, a NaN counting as largest)."""
    size = counts.size
    start = 0
    end = size
    if counts[0] == 0 or counts[size - 1] == 0:
        start = size
        for i in range(size):
            if counts[i] > 0:
                start = i
                break
        if start == size:  # no count above 0: numpy's argmax of all False is 0
            start = 0
        last = 0
        for i in range(size - 1, -1, -1):
            if counts[i] > 0:
                last = size - 1 - i
                break
        end = size - last
    m = end - start
    c = np.empty(m, np.float32)
    for i in range(m):
        c[i] = np.float32(counts[start + i])
    cb = c * centers[start:end]
    weight1 = np.empty(m, np.float32)
    weight2 = np.empty(m, np.float32)
    weight1[0] = c[0]
    for i in range(1, m):
        weight1[i] = weight1[i - 1] + c[i]
    weight2[m - 1] = c[m - 1]
    for i in range(m - 2, -1, -1):
        weight2[i] = weight2[i + 1] + c[i]
    sum1 = np.empty_like(cb)
    sum2 = np.empty_like(cb)
    sum1[0] = cb[0]
    for i in range(1, m):
        sum1[i] = sum1[i - 1] + cb[i]
    sum2[m - 1] = cb[m - 1]
    for i in range(m - 2, -1, -1):
        sum2[i] = sum2[i + 1] + cb[i]
    best = 0
    top = 0.0
    for i in range(m - 1):
        mean1 = sum1[i] / weight1[i]
        mean2 = sum2[i + 1] / weight2[i + 1]
        d = mean1 - mean2
        v = weight1[i] * weight2[i + 1] * (d * d)
        if i == 0:
            top = v
            if v != v:
                break
        elif v != v:
            best = i
            break
        elif v > top:
            top = v
            best = i
    return start + best


@nb.njit(cache=True, nogil=True)
def _ddot_blocks(row, target, index, count, fn, d, t):
    """``excess._partial_sums(design, target, index[:count])`` (a one-row design): per block
    of ``d.size`` indices, the gathered values' ``0.0 + ddot`` (numpy's dot of a 1 x L by an
    L x 1 matrix and by an L vector) added to 0.0, by numpy's CBLAS ``ddot``. ``d`` and
    ``t`` are the gathering buffers (the caller's, so they outlive the calls)."""
    g = 0.0
    h = 0.0
    block = d.size
    for start in range(0, count, block):
        size = min(block, count - start)
        for j in range(size):
            d[j] = row[index[start + j]]
            t[j] = target[index[start + j]]
        g += 0.0 + _call_ddot(fn[_DDOT], size, d.ctypes.data, d.ctypes.data)
        h += 0.0 + _call_ddot(fn[_DDOT], size, d.ctypes.data, t.ctypes.data)
    return g, h


@nb.njit(cache=True, nogil=True)
def one_row_fit(row, target, n, g, h, upper, unit, floor_scale, log_alpha, rounds, block,
                fn, mu, below, hard, left, joined, kept, coef):
    """``excess._fit_one_row_numpy``'s rounds (a one-row float64 design ``row``, ``g`` and
    ``h`` its Gram sums, ``n`` the counts): the same IEEE operations on the same values,
    the moved bins' sums by numpy's ``ddot`` (:func:`_ddot_blocks`). Fills ``mu``,
    ``kept`` and ``coef``; returns 0, or 2 where a round leaves bins to ``gammainc`` or a
    value is NaN (the numpy form then runs the fit)."""
    kept[:] = True
    coef[0] = 0.0
    d = np.empty(min(block, max(kept.size, 1)))  # one block holds every bin when fewer
    t = np.empty(d.size)
    for _ in range(rounds):
        value = 0.0
        if upper > 0.0 and g > 0.0:  # excess._one_unknown with lower 0
            scale = np.sqrt(g)
            gg = g / (scale * scale) + 1e-9
            x = (h / scale) / gg
            lo = 0.0 * scale
            hi = upper * scale
            if x != x or lo != lo or hi != hi:
                return 2
            x = x if x > lo else lo
            x = x if x < hi else hi
            value = x / scale
        coef[0] = value
        one_row_model(row, value, unit, floor_scale, mu)
        if poisson_tail_verdicts(n, mu, log_alpha, below, hard):
            return 2
        n_kept, n_left, n_joined = kept_changes(kept, below, left, joined)
        if n_kept == 0 or (n_left == 0 and n_joined == 0):
            return 0
        if n_left:
            g_out, h_out = _ddot_blocks(row, target, left, n_left, fn, d, t)
            g, h = g - g_out, h - h_out
        if n_joined:
            g_in, h_in = _ddot_blocks(row, target, joined, n_joined, fn, d, t)
            g, h = g + g_in, h + h_in
        else:
            g, h = g + 0.0, h + 0.0
        for i in range(kept.size):
            kept[i] = not below[i]
    return 0
