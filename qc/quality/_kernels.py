"""Compiled kernels behind :mod:`plexwash.qc.quality` (numba).

Each works in one pass without temporaries the size of its input,
releases the GIL (``nogil``) and is cached on disk (``cache=True``).
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def _neighbour_level(image, y, x):
    """The second largest of the pixel's neighbours inside the image, floored at 0."""
    height, width = image.shape
    first = -np.inf
    second = -np.inf
    for dy in range(-1, 2):
        yy = y + dy
        if yy < 0 or yy >= height:
            continue
        for dx in range(-1, 2):
            xx = x + dx
            if (dy == 0 and dx == 0) or xx < 0 or xx >= width:
                continue
            v = np.float64(image[yy, xx])
            if v > first:
                second = first
                first = v
            elif v > second:
                second = v
    return max(second, 0.0)


@nb.njit(cache=True, nogil=True, inline="always")
def _top2(first, second, v):
    """(first, second) of the values seen so far once ``v`` is added (ties count twice)."""
    if v > first:
        return v, first
    if v > second:
        return first, v
    return first, second


@nb.njit(cache=True, nogil=True)
def suppress_spikes(image, ratio, excess, out):
    """Copy ``image`` into ``out`` (float32 or float64) with isolated spikes set to their neighbourhood.

    ``level`` is the second largest of the pixel's neighbours inside the image (8, fewer
    at the edges; a missing neighbour counts as minus infinity), floored at 0. A pixel
    is a spike when ``v > ratio * level``, ``v - level >= excess`` and ``v > 0``; it
    becomes ``level``. Detection reads the input only. Returns the number of spikes.

    Since ``level >= 0``, ``v - level >= excess`` needs ``v >= excess``: pixels below
    ``excess`` (most of a channel's background) are copied without looking at their
    neighbours. Inside the image the 8 neighbours are ranked without bounds checks.
    """
    height, width = image.shape
    count = 0
    for y in range(height):
        inner_row = 0 < y < height - 1
        for x in range(width):
            v = np.float64(image[y, x])
            if not (v > 0 and v >= excess):
                out[y, x] = v
                continue
            if inner_row and 0 < x < width - 1:
                first = -np.inf
                second = -np.inf
                first, second = _top2(first, second, np.float64(image[y - 1, x - 1]))
                first, second = _top2(first, second, np.float64(image[y - 1, x]))
                first, second = _top2(first, second, np.float64(image[y - 1, x + 1]))
                first, second = _top2(first, second, np.float64(image[y, x - 1]))
                first, second = _top2(first, second, np.float64(image[y, x + 1]))
                first, second = _top2(first, second, np.float64(image[y + 1, x - 1]))
                first, second = _top2(first, second, np.float64(image[y + 1, x]))
                first, second = _top2(first, second, np.float64(image[y + 1, x + 1]))
                level = max(second, 0.0)
            else:
                level = _neighbour_level(image, y, x)
            if v > level * ratio and v - level >= excess:
                out[y, x] = level
                count += 1
            else:
                out[y, x] = v
    return count


@nb.njit(cache=True, nogil=True)
def split_mean_std(values, mask):
    """Mean and standard deviation of the pixels inside ``mask`` and of those outside.

    Two passes over the image (the sums, then the squared deviations), each side summed
    in float64 in row-major order. Returns ``(mean_in, std_in, mean_out, std_out)``; a side
    without pixels gives NaN.
    """
    height, width = values.shape
    n_in = 0
    n_out = 0
    total_in = 0.0
    total_out = 0.0
    for y in range(height):
        for x in range(width):
            if mask[y, x]:
                total_in += values[y, x]
                n_in += 1
            else:
                total_out += values[y, x]
                n_out += 1
    mean_in = total_in / n_in if n_in else np.nan
    mean_out = total_out / n_out if n_out else np.nan
    squares_in = 0.0
    squares_out = 0.0
    for y in range(height):
        for x in range(width):
            if mask[y, x]:
                d = values[y, x] - mean_in
                squares_in += d * d
            else:
                d = values[y, x] - mean_out
                squares_out += d * d
    std_in = np.sqrt(squares_in / n_in) if n_in else np.nan
    std_out = np.sqrt(squares_out / n_out) if n_out else np.nan
    return mean_in, std_in, mean_out, std_out


@nb.njit(cache=True, nogil=True)
def uniform_histogram(values, edges, out):
    """Counts of ``values`` in the bins between ``edges`` (``numpy.histogram`` with uniform bins).

    ``edges`` are ``numpy.histogram``'s own (``numpy.linspace`` over the range, in its
    type); a value goes to the bin ``i`` with ``edges[i] <= v < edges[i + 1]``, the last
    bin holding its right edge too, as numpy decides after its first estimate. Values
    outside the edges are not counted. ``out`` (int64, ``len(edges) - 1``) is added to.
    """
    n_bins = edges.size - 1
    first = np.float64(edges[0])
    last = np.float64(edges[n_bins])
    scale = n_bins / (last - first)
    flat = values.ravel()
    for k in range(flat.size):
        v = flat[k]
        if not (v >= edges[0] and v <= edges[n_bins]):
            continue
        i = int((np.float64(v) - first) * scale)
        if i >= n_bins:
            i = n_bins - 1
        if i < 0:
            i = 0
        while i > 0 and v < edges[i]:
            i -= 1
        while i < n_bins - 1 and v >= edges[i + 1]:
            i += 1
        out[i] += 1


#: Most series terms :func:`poisson_tail_verdicts` sums before it leaves a bin to gammainc.
SERIES_TERMS = 400


@nb.njit(cache=True, nogil=True)
def poisson_tail_verdicts(n, mu, log_alpha, out, hard):
    """``out[i] = P(N >= n[i]) < alpha`` for N ~ Poisson(mu[i]), where bounds decide it.

    Cheap tests first: not below where ``n <= mu + sqrt(mu)``; below where ``n >= 8 mu``
    and ``n + mu`` is above ``-log(alpha)`` (with ``r = n / mu >= 8``, the Chernoff exponent
    ``n log(n / mu) - n + mu = mu (r log r - r + 1) >= mu (r + 1) = n + mu``, as ``r log r
    >= 2 r`` for ``r >= e^2``), or where the Chernoff bound ``exp(-(n log(n / mu) - n +
    mu))`` is under ``alpha``. A bin they leave undecided
    (``mu + sqrt(mu) < n``, so ``mu / (n + k) < 1``) sums the series ``P(n, mu) = mu^n e^-mu
    / Gamma(n + 1) * (1 + mu / (n + 1) + mu^2 / ((n + 1)(n + 2)) + ...)`` (Abramowitz &
    Stegun 6.5.29) term by term: the partial sum is a lower bound and, the term ratios
    falling with ``k``, the partial sum plus the next term's geometric tail an upper
    bound. The bin is decided once a bound clears ``log(alpha)`` by a margin far above the
    rounding of the logarithms (``1e-9`` plus ``1e-13`` of their magnitude). The indices
    of the bins no bound decides (their ``P`` within that margin of ``alpha``, or the series
    too slow) are written to ``hard``; their count is returned, for ``gammainc``.
    """
    count = 0
    for i in range(n.size):
        verdict = _tail_verdict(n[i], mu[i], log_alpha)
        out[i] = verdict == 1
        if verdict == 2:
            hard[count] = i
            count += 1
    return count


@nb.njit(cache=True, nogil=True, inline="always")
def _tail_verdict(ni, mi, log_alpha):
    """:func:`poisson_tail_verdicts` of one bin: 1 below alpha, 0 not, 2 left to gammainc."""
    if not ni > mi:  # mi + sqrt(mi) >= mi in floating point too: no root needed
        return 0
    if not ni > mi + np.sqrt(mi):
        return 0
    if ni >= 8.0 * mi and ni + mi > -log_alpha + 1e-6:
        return 1
    log_mu = np.log(mi)
    upper = -(ni * (np.log(ni) - log_mu) - ni + mi)
    if upper < log_alpha - 1e-9:
        return 1
    lgam = math.lgamma(ni + 1.0)
    prefactor = ni * log_mu - mi - lgam
    margin = 1e-9 + 1e-13 * (abs(ni * log_mu) + mi + abs(lgam))
    # the bounds on the sum itself: log comparisons without a logarithm per term
    # (exp is good to its last bit, far inside the margin; an overflow to inf is the
    # right answer: every finite sum is below such a limit)
    at_least = np.exp(log_alpha + margin - prefactor)
    below = np.exp(log_alpha - margin - prefactor)
    term = 1.0
    total = 1.0
    for k in range(1, SERIES_TERMS + 1):
        term *= mi / (ni + k)
        total += term
        if total >= at_least:
            return 0
        ratio = mi / (ni + k + 1.0)
        if total + term * ratio / (1.0 - ratio) < below:
            return 1
    return 2


@nb.njit(cache=True, nogil=True, inline="always")
def _order_key(v, is_float):
    """An unsigned key that orders like the value (IEEE bits of a float32, flipped)."""
    key = np.uint32(v)
    if is_float:
        key = ~key if key & np.uint32(0x80000000) else key | np.uint32(0x80000000)
    return key


@nb.njit(cache=True, nogil=True)
def order_keys(values, is_float, ranks, out):
    """``out[j]`` = the key of the ``ranks[j]``-th smallest value (0-based), by radix selection.

    ``values`` (1-D) are float32 bits (``is_float``; seen as uint32) or unsigned integers of
    up to 32 bits. Two passes of 16-bit histograms: the top halves of the keys, then the low
    halves of the keys whose top half holds a wanted rank (found by one table look-up). Returns False, leaving ``out``,
    where a float is NaN or a negative zero (which order statistic such a value is cannot be
    told apart from +0.0 by its key alone: the caller sorts those itself).
    """
    size = values.size
    counts = np.zeros(65536, np.int64)
    for i in range(size):
        bits = np.uint32(values[i])
        if is_float and ((bits & np.uint32(0x7F800000)) == np.uint32(0x7F800000)
                         and (bits & np.uint32(0x007FFFFF)) != 0 or bits == np.uint32(0x80000000)):
            return False
        counts[_order_key(values[i], is_float) >> np.uint32(16)] += 1
    n_ranks = ranks.size
    top = np.zeros(n_ranks, np.int64)
    before = np.empty(n_ranks, np.int64)
    for j in range(n_ranks):
        seen = 0
        for b in range(65536):
            if seen + counts[b] > ranks[j]:
                top[j] = b
                before[j] = seen
                break
            seen += counts[b]
    # each wanted top half's row of low-half counts: that of the first rank holding it
    # (-1: no rank's), looked up once per value
    row_of = np.full(65536, -1, np.int64)
    for j in range(n_ranks - 1, -1, -1):
        row_of[top[j]] = j
    low = np.zeros((n_ranks, 65536), np.int64)
    for i in range(size):
        key = _order_key(values[i], is_float)
        row = row_of[np.int64(key >> np.uint32(16))]
        if row >= 0:
            low[row, np.int64(key & np.uint32(0xFFFF))] += 1
    for j in range(n_ranks):
        first = row_of[top[j]]
        seen = before[j]
        for b in range(65536):
            if seen + low[first, b] > ranks[j]:
                out[j] = (np.uint32(top[j]) << np.uint32(16)) | np.uint32(b)
                break
            seen += low[first, b]
    return True


@nb.njit(cache=True, nogil=True, inline="always")
def _reflected(i, n):
    """Index ``i`` of a line of ``n`` extended by reflection (``d c b a | a b c d | d c b a``)."""
    period = 2 * n
    i %= period
    return i if i < n else period - 1 - i


@nb.njit(cache=True, nogil=True)
def gaussian_reflect(image, weights, out):
    """``scipy.ndimage.gaussian_filter(image, sigma, mode="reflect", output=out)`` of a 2-D image.

    ``weights`` are scipy's (odd length ``2 r + 1``, symmetric); ``out`` has the image's shape,
    its own type and its own memory (not ``image``). The same steps as scipy's
    ``correlate1d`` for a symmetric filter, axis 0 then axis 1: each value is ``v * w[r]``
    plus, from the outermost pair in, ``(v[-j] + v[+j]) * w[r - j]``, in float64, rounded to
    the output type between the axes; so the same bits. Row by row: a row done along axis 0
    is at once filtered along axis 1 (it needs nothing else).
    """
    height, width = image.shape
    r = weights.size // 2
    centre = weights[r]
    row = np.empty(width)
    line = np.empty(width + 2 * r)
    for y in range(height):
        for x in range(width):
            row[x] = np.float64(image[y, x]) * centre
        for j in range(-r, 0):
            w = weights[r + j]
            above = image[_reflected(y + j, height)]
            below = image[_reflected(y - j, height)]
            for x in range(width):
                row[x] += (np.float64(above[x]) + np.float64(below[x])) * w
        for x in range(width):
            out[y, x] = row[x]  # stored in the output type between the axes, as scipy does
        for i in range(r):  # the reflected ends; the row itself copied straight
            line[i] = out[y, _reflected(i - r, width)]
            line[width + r + i] = out[y, _reflected(width + i, width)]
        for x in range(width):
            line[x + r] = out[y, x]
        for x in range(width):
            row[x] = line[x + r] * centre
        for j in range(-r, 0):
            w = weights[r + j]
            for x in range(width):
                row[x] += (line[x + r + j] + line[x + r - j]) * w
        for x in range(width):
            out[y, x] = row[x]


@nb.njit(cache=True, nogil=True)
def mark_levels(plane, loud, bright, out):
    """``out`` (int8) = 2 where ``plane >= bright``, else 1 where ``plane >= loud``, else 0."""
    height, width = plane.shape
    for y in range(height):
        for x in range(width):
            v = plane[y, x]
            out[y, x] = 2 if v >= bright else (1 if v >= loud else 0)


@nb.njit(cache=True, nogil=True)
def _box3_line(ext, length, out, stride_out, start):
    """scipy's uniform filter of size 3 along one line padded with zeros (``ext`` holds the
    line between two zeros): a running sum, each output the sum divided by 3."""
    total = 0.0
    total += ext[0]
    total += ext[1]
    total += ext[2]
    out[start] = total / 3.0
    for i in range(1, length):
        total += ext[i + 2] - ext[i - 1]
        out[start + i * stride_out] = total / 3.0


@nb.njit(cache=True, nogil=True)
def box3_sums(values, out):
    """``out`` = ``scipy.ndimage.uniform_filter(values, 3, mode="constant") * 9`` (2-D float64).

    scipy's steps: along axis 0 then axis 1, each line padded with one zero at each end, a
    running sum of 3 values divided by 3, stored in float64 between the axes; then times 9.
    """
    height, width = values.shape
    work = np.empty((height, width))
    ext = np.empty(max(height, width) + 2)
    flat_work = work.reshape(-1)
    for x in range(width):
        ext[0] = 0.0
        for y in range(height):
            ext[y + 1] = values[y, x]
        ext[height + 1] = 0.0
        _box3_line(ext, height, flat_work, width, x)
    flat_out = out.reshape(-1)
    for y in range(height):
        ext[0] = 0.0
        for x in range(width):
            ext[x + 1] = work[y, x]
        ext[width + 1] = 0.0
        _box3_line(ext, width, flat_out, 1, y * width)
    for y in range(height):
        for x in range(width):
            out[y, x] = out[y, x] * 9.0


@nb.njit(cache=True, nogil=True)
def largest_excess3(n, mu, out):
    """``out`` = ``maximum_filter(n - mu, 3, mode="constant", cval=0.0)`` floored at 0 as
    ``numpy.maximum(., 0.0)`` does (``a >= 0 or a is NaN ? a : 0``): the largest single-bin
    excess of each 3 x 3 window, outside the grid counting as 0. For finite values; a zero's
    sign may differ from scipy's (no comparison of the excess test sees it)."""
    height, width = n.shape
    for y in range(height):
        for x in range(width):
            top = 0.0 if (y == 0 or y == height - 1 or x == 0 or x == width - 1) else -np.inf
            for yy in range(max(y - 1, 0), min(y + 2, height)):
                for xx in range(max(x - 1, 0), min(x + 2, width)):
                    d = n[yy, xx] - mu[yy, xx]
                    if d > top:
                        top = d
            out[y, x] = top if (top >= 0.0 or np.isnan(top)) else 0.0


@nb.njit(cache=True, nogil=True)
def _pairwise_sum(a, start, n):
    """numpy's pairwise sum of ``a[start:start + n]`` (float64; its ``pairwise_sum`` of a
    contiguous run: eight running sums per block of up to 128, halves above)."""
    if n < 8:
        total = -0.0
        for i in range(n):
            total += a[start + i]
        return total
    if n <= 128:
        r0 = a[start]
        r1 = a[start + 1]
        r2 = a[start + 2]
        r3 = a[start + 3]
        r4 = a[start + 4]
        r5 = a[start + 5]
        r6 = a[start + 6]
        r7 = a[start + 7]
        i = 8
        while i < n - (n % 8):
            r0 += a[start + i]
            r1 += a[start + i + 1]
            r2 += a[start + i + 2]
            r3 += a[start + i + 3]
            r4 += a[start + i + 4]
            r5 += a[start + i + 5]
            r6 += a[start + i + 6]
            r7 += a[start + i + 7]
            i += 8
        total = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
        while i < n:
            total += a[start + i]
            i += 1
        return total
    half = n // 2
    half -= half % 8
    return _pairwise_sum(a, start, half) + _pairwise_sum(a, start + half, n - half)


@nb.njit(cache=True, nogil=True)
def quiet_sums(image, keep, edges, out):
    """The stripe test's line counts (``stripes.quiet_line_counts``) of rows 1 to Y - 2.

    ``out[0, k, y]`` = the sum over part ``k`` (``edges``) of ``image[y] * keep[y]`` and
    ``out[1, k, y]`` that of ``(image[y - 1] + image[y + 1]) * keep[y]``, each product in
    float64 as numpy's ``multiply``/``add`` with ``dtype=float64`` make it, each part summed
    as ``numpy.add.reduceat`` sums it (the first value, plus numpy's pairwise sum of the
    rest), so the same bits.
    """
    height, width = image.shape
    line = np.empty(width)
    beside = np.empty(width)
    for y in range(1, height - 1):
        for x in range(width):
            k = np.float64(keep[y, x])
            line[x] = np.float64(image[y, x]) * k
            beside[x] = (np.float64(image[y - 1, x]) + np.float64(image[y + 1, x])) * k
        for part in range(edges.size - 1):
            start = edges[part]
            n = edges[part + 1] - start
            out[0, part, y] = line[start] + _pairwise_sum(line, start + 1, n - 1)
            out[1, part, y] = beside[start] + _pairwise_sum(beside, start + 1, n - 1)


@nb.njit(cache=True, nogil=True)
def bin_sums(values, size, out):
    """``out[i, j]`` = the sum of the ``size`` x ``size`` bin (i, j) of ``values`` in float64,
    as ``channel._bin_sums`` adds it with numpy: each band's rows added in turn to 0.0
    (``band.sum(axis=0, dtype=float64)``), then each bin's columns as ``np.add.reduceat``
    sums them (the first, plus numpy's pairwise sum of the rest)."""
    height, width = values.shape
    band = np.empty(width)
    for i in range(out.shape[0]):
        top = i * size
        for x in range(width):
            band[x] = 0.0  # numpy's axis-0 sum starts from its identity
        for y in range(top, min(top + size, height)):
            for x in range(width):
                band[x] += np.float64(values[y, x])
        for j in range(out.shape[1]):
            start = j * size
            n = min(size, width - start)
            out[i, j] = band[start] + _pairwise_sum(band, start + 1, n - 1)


@nb.njit(cache=True, nogil=True)
def values_at_most(plane, limit, out):
    """``plane[plane <= limit]`` (row-major order) written to the start of ``out`` (its size
    at least ``plane.size``); returns how many. NaN is never at most anything."""
    flat = plane.ravel()
    count = 0
    for i in range(flat.size):  # without a branch: each value written, kept if at most
        v = flat[i]
        out[count] = v
        count += 1 if v <= limit else 0
    return count
