"""Compiled loops of the wash steps' tables and tests (speckle tables, residue test, region
histogram, the background scale's bisection step), beside :mod:`._kernels`' filters.

scipy's special functions are called through the C function pointers that
``scipy.special.cython_special`` exports (passed in as arguments, so the compiled code is
cached), the same functions the ``scipy.special`` ufuncs compute.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def zone_presence(zone, present):
    """Set ``present[z]`` for every zone code ``z`` of the uint8 map ``zone`` (any shape, flat)."""
    flat = zone.ravel()
    for i in range(flat.size):
        present[flat[i]] = True


@nb.njit(cache=True, nogil=True)
def binomial_search(trials, rates, alphas, bdtrc, out):
    """Per entry ``i``, the smallest ``k`` with ``P(N >= k) < alphas[i]``, ``N ~ Binomial(trials[i],
    rates[i])``, by bisection on ``[0, trials + 1]`` (``P(N >= k) = bdtrc(k - 1, n, p)``; ``bdtrc``
    is scipy's own, ``scipy.special.cython_special``, passed in). Written to ``out`` (int64)."""
    for i in range(trials.size):
        n = trials[i]
        low = 0  # P(N >= 0) = 1 >= alpha
        high = n + 1  # P(N >= n + 1) = 0 < alpha
        while high - low > 1:
            mid = (low + high) // 2
            if bdtrc(np.float64(mid - 1), n, rates[i], 0) < alphas[i]:
                high = mid
            else:
                low = mid
        out[i] = high


@nb.njit(cache=True, nogil=True)
def poisson_search(levels, alpha, pdtrc, out):
    """Per finite entry, the smallest whole ``v >= 1`` with ``P(Y >= v) < alpha``, ``Y ~
    Poisson(levels[i])`` (``P(Y >= v) = pdtrc(v - 1, level)``, scipy's own, passed in): doubling,
    then bisection. Written to ``out`` (float64)."""
    for i in range(levels.size):
        level = levels[i]
        low = 0
        high = 1
        while pdtrc(np.float64(high - 1), level, 0) >= alpha:
            low = high
            high = 2 * high
        while high - low > 1:
            mid = (low + high) // 2
            if pdtrc(np.float64(mid - 1), level, 0) < alpha:
                high = mid
            else:
                low = mid
        out[i] = high


@nb.njit(cache=True, nogil=True)
def region_histogram(image, counts, threshold, radius, zone, zones_per_part, histogram):
    """Add each full window to ``histogram[part, centre positive, n]`` (int64), ``part`` the zone
    part of its centre (``zone // zones_per_part``), ``n`` its positive neighbours.

    The part of each of the 256 codes is looked up (no division per pixel), and the windows are
    counted into four flat histograms in turn (neighbouring pixels often fall in the same bin;
    four counters break that chain of dependent increments), added together at the end: whole
    numbers, so the same counts."""
    height, width = image.shape
    parts, centres, bins = histogram.shape
    part_of = np.empty(256, np.int64)
    for code in range(256):
        part_of[code] = (code // zones_per_part) * centres * bins
    partial = np.zeros((4, parts * centres * bins), np.int64)
    for y in range(radius, height - radius):
        row, row_counts, row_zone = image[y], counts[y], zone[y]
        for x in range(radius, width - radius):
            centre = 1 if row[x] > threshold else 0
            partial[x & 3, part_of[row_zone[x]] + centre * (bins - 1) + np.int64(row_counts[x])] += 1
    flat = histogram.reshape(-1)
    for k in range(flat.size):
        flat[k] += partial[0, k] + partial[1, k] + partial[2, k] + partial[3, k]


@nb.njit(cache=True, nogil=True)
def residue_candidates(image, spilled, zone, levels, measured, expected, where):
    """The pixels :func:`plexwash.qc.steps.speckle_tests.drop_residue` tests, in row-major order:
    ``image > 0``, ``spilled > 0`` and ``spilled >= b`` for the background ``b = levels[zone]``.
    For each, the 3 x 3 sums (clipped at the edges, added in the order of ``box3``: rows, then
    columns, from a zero start, outside pixels adding 0) of ``floor(image + spilled + 0.5)`` into
    ``measured`` and of ``spilled + b`` into ``expected`` (float64), its flat index into ``where``.
    Returns how many."""
    height, width = image.shape
    found = 0
    for y in range(height):
        for x in range(width):
            g = spilled[y, x]
            if not (image[y, x] > 0 and g > 0 and np.float64(g) >= levels[zone[y, x]]):
                continue
            total = 0.0
            mean = 0.0
            for dy in range(-1, 2):
                for dx in range(-1, 2):
                    yy = y + dy
                    xx = x + dx
                    if 0 <= yy < height and 0 <= xx < width:
                        total += np.floor(np.float64(image[yy, xx]) + np.float64(spilled[yy, xx]) + 0.5)
                        mean += np.float64(spilled[yy, xx]) + levels[zone[yy, xx]]
                    else:
                        total += 0.0
                        mean += 0.0
            measured[found] = total
            expected[found] = mean
            where[found] = y * width + x
            found += 1
    return found


@nb.njit(cache=True, nogil=True, error_model="numpy")
def tail_decision(n, m, s, target, first, second, values):
    """One step of the lower-tail scale bisection (:class:`plexwash.qc.background._TailSearch`):
    ``values = (n - s m) / sqrt(s m)`` elementwise, then ``(1, 0, 0)`` when at most ``first`` of
    them are ``<= target`` (the quantile is above it), ``(0, 0, 0)`` when more than ``second``
    are, else ``(2, a, b)`` with ``a``, ``b`` the order statistics ``first`` and ``second``.

    ``second`` is ``first + 1`` (or equal to it, when nothing is undecided), so the undecided
    case has exactly ``second`` values ``<= target``: the order statistic ``first`` is the
    largest of them and ``second`` the smallest of the others, found in one pass without
    sorting. numpy's error model (a division by 0 gives inf, as numpy's does, instead of
    raising) lets the values loop run on vector registers; IEEE division and square root give
    the same bits either way.

    For a negative ``target`` a value ``v = e / sqrt(p)`` (``e = n - s m``, ``p = s m``, both
    computed as above) is ``<= target`` exactly when ``e < 0`` and ``e**2 >= target**2 p``; the
    computed ``v`` and squares are within a few units of rounding (1e-15) of the true ones, so
    where the squares differ by more than 1e-9 of their size they decide as the computed ``v``
    does, and only closer ones are divided out. The values themselves are computed only when
    the count leaves the step undecided."""
    size = n.size
    at_most = 0
    if target < 0.0:  # counted without the square root where squares decide (see below)
        squared = target * target
        close = 0
        for i in range(size):  # no branches: runs on vector registers
            product = s * m[i]
            excess = n[i] - product
            left = excess * excess
            right = squared * product
            negative = excess < 0.0
            at_most += negative & (left > right * (1.0 + 1e-9))
            close += negative & (left <= right * (1.0 + 1e-9)) & (left >= right * (1.0 - 1e-9))
        if close:
            for i in range(size):
                product = s * m[i]
                excess = n[i] - product
                left = excess * excess
                right = squared * product
                if (excess < 0.0 and left <= right * (1.0 + 1e-9) and left >= right * (1.0 - 1e-9)
                        and excess / np.sqrt(product) <= target):
                    at_most += 1
    else:
        for i in range(size):
            product = s * m[i]
            if (n[i] - product) / np.sqrt(product) <= target:
                at_most += 1
    if at_most <= first:
        return 1, 0.0, 0.0
    if at_most > second:
        return 0, 0.0, 0.0
    for i in range(size):
        product = s * m[i]
        values[i] = (n[i] - product) / np.sqrt(product)
    a = -np.inf
    b = np.inf
    for i in range(size):
        v = values[i]
        if v <= target:
            if v > a:
                a = v
        elif v < b:
            b = v
    return 2, a, b


@nb.njit(cache=True, nogil=True)
def tail_bisection(n, m, low, high, target, first, second, gamma, start, scale, values, mids, scales, bounds,
                   decisions):
    """The lower-tail scale bisection of :func:`plexwash.qc.background.lower_tail_scale`, its steps
    ``start`` to ``mids.size - 1`` in one loop from the bracket ``[low, high]`` (log scale), each
    deciding by :func:`tail_decision` and, when undecided, by numpy's interpolation of the two
    order statistics with weight ``gamma``, as ``_tail_search.TailSearch.above`` does. The scale of
    step ``start`` is ``scale`` when that is positive, every other one ``exp(mid)``; each step's
    ``mid``, scale, bracket before it and decision (``above``) are written to ``mids``, ``scales``,
    ``bounds`` and ``decisions`` so the caller can check the scales against numpy's ``exp`` and
    resume. Returns the final ``(low, high)``."""
    for step in range(start, mids.size):
        bounds[step, 0] = low
        bounds[step, 1] = high
        mid = 0.5 * (low + high)
        s = scale if step == start and scale > 0.0 else np.exp(mid)
        mids[step] = mid
        scales[step] = s
        code, a, b = tail_decision(n, m, s, target, first, second, values)
        if code < 2:
            above = code == 1
        else:
            diff = b - a
            if gamma >= 0.5:
                value = b - diff * (1 - gamma)
            else:
                value = a + diff * gamma
            above = value > target
        decisions[step] = above
        if above:
            low = mid
        else:
            high = mid
    return low, high


@nb.njit(cache=True, nogil=True)
def _running_mean(line, length, size, out, start, stride):
    """scipy's uniform filter of one line held in ``line`` with its padding (``size // 2`` values
    before, the rest after): the sum of the first ``size`` values, then a running sum moved by
    the difference of the entering and leaving values, each output the sum divided by ``size``
    (``NI_UniformFilter1D``)."""
    total = 0.0
    for k in range(size):
        total += line[k]
    out[start] = total / size
    for k in range(1, length):
        total += line[k + size - 1] - line[k - 1]
        out[start + k * stride] = total / size


@nb.njit(cache=True, nogil=True)
def box_mean_constant(values, size, out):
    """``out`` = ``scipy.ndimage.uniform_filter(values, size, mode="constant")`` for a 2-D float64
    plane and an odd or even ``size >= 2``: along axis 0 then axis 1, each line padded with zeros,
    the intermediate plane float64, as scipy computes it."""
    height, width = values.shape
    before = size // 2
    line = np.zeros(max(height, width) + size)
    work = np.empty(height * width)
    flat = out.reshape(-1)
    for x in range(width):
        for y in range(height):
            line[before + y] = values[y, x]
        _running_mean(line, height, size, work, x, width)
    for k in range(line.size):
        line[k] = 0.0
    for y in range(height):
        for x in range(width):
            line[before + x] = work[y * width + x]
        _running_mean(line, width, size, flat, y * width, 1)


@nb.njit(cache=True, nogil=True)
def binomial_grid_search(trials, rates, alpha, bdtrc, out):
    """:func:`binomial_search` of every pair of the ascending ``trials`` and the ``rates``,
    ``out[t, r]`` (int64), each rate's column walked up the trial counts.

    For one rate the answer does not fall as the trials grow (``P(N >= k)`` grows with them),
    so the walk starts where the previous trial count ended: it checks that the count below
    the start is not yet improbable, then asks the counts above it one by one, the first
    improbable one being the answer. ``P(N >= k)`` falls with ``k``, so that is the count the
    bisection finds; where the check fails, or after ``8`` steps, the entry is searched by the
    bisection itself on what is left open (``P(N >= k) = bdtrc(k - 1, n, p)``, as there)."""
    for r in range(rates.size):
        p = rates[r]
        previous = 1
        for t in range(trials.size):
            n = trials[t]
            low = 0
            high = n + 1
            start = min(previous, n + 1)
            if start >= 2 and bdtrc(np.float64(start - 2), n, p, 0) < alpha:
                start = 1  # not as expected: the whole range is bisected
            if start >= 2:
                low = start - 1
            k = low + 1
            steps = 0
            while k < high and steps < 8:
                if bdtrc(np.float64(k - 1), n, p, 0) < alpha:
                    high = k
                    break
                low = k
                k += 1
                steps += 1
            while high - low > 1:
                mid = (low + high) // 2
                if bdtrc(np.float64(mid - 1), n, p, 0) < alpha:
                    high = mid
                else:
                    low = mid
            out[t, r] = high
            previous = high


#: Largest magnitude of a whole value :func:`whole_block_sums` adds (sums of up to 2**12 such
#: values stay below 2**53, where float64 holds every whole number).
WHOLE_LIMIT = 2.0**40


@nb.njit(cache=True, nogil=True)
def whole_block_sums(plane, block, sums):
    """Sums of ``block`` x ``block`` blocks of a (Y, X) plane into ``sums`` (float64, the blocks
    of the far edges partial) when every value is a whole number of magnitude at most
    :data:`WHOLE_LIMIT`: then each sum is exact, whatever the order of the additions. Returns
    False, at the first other value (a fraction, NaN, an infinity), with ``sums`` unfinished."""
    height, width = plane.shape
    columns = np.empty(width, np.float64)
    for b_row in range(sums.shape[0]):
        columns[:] = 0.0
        whole = True
        for y in range(b_row * block, min(b_row * block + block, height)):
            row = plane[y]
            for x in range(width):  # no branches: runs on vector registers
                v = np.float64(row[x])
                whole &= (abs(v) <= WHOLE_LIMIT) & (v == np.floor(v))
                columns[x] += v
        if not whole:
            return False
        for b in range(sums.shape[1]):
            total = 0.0
            for x in range(b * block, min(b * block + block, width)):
                total += columns[x]
            sums[b_row, b] = total
    return True


@nb.njit(cache=True, nogil=True)
def log_factorials(out):
    """``out[k] = lgamma(k + 1)``, the C library's, exactly as :func:`tail_bounds` computes it."""
    for k in range(out.size):
        out[k] = math.lgamma(np.float64(k) + 1.0)


@nb.njit(cache=True, nogil=True)
def tail_bounds(n, mu, log_alpha, factorials, out, undecided):
    """The bounds of :func:`plexwash.qc._tail_search.tail_below` on 1-D float64 ``n`` and ``mu``:
    ``out[i]`` True where the upper bound on ``P(N >= n)`` is below ``alpha`` by the margin and
    the lower bound is not above it; the indices where neither bound decides (or the bounds do
    not apply: ``n`` or ``mu`` at least ``1e7``, ``mu <= 1e-300``, ``n < 1``, ``n <= mu``, ``n``
    not whole, NaN) are written to ``undecided``; returns how many.

    ``lgamma(n + 1)`` is read from ``factorials`` (:func:`log_factorials`: the same values) for
    the counts it holds; the upper bound is computed only where the lower one leaves ``out``
    open (where ``P(N = n)`` alone is above ``alpha``, ``out`` is False whatever it says)."""
    left = 0
    for i in range(n.size):
        count = n[i]
        mean = mu[i]
        if (count < 1e7 and mean < 1e7 and mean > 1e-300 and count >= 1.0 and count > mean
                and count == np.floor(count)):
            whole = np.int64(count)
            log_count = factorials[whole] if whole < factorials.size else math.lgamma(count + 1.0)
            log_p = count * math.log(mean) - mean - log_count
            if log_p > log_alpha + 1e-6:  # probable
                out[i] = False
                continue
            if (log_p - math.log1p(-mean / (count + 1.0))) < log_alpha - 1e-6:  # improbable
                out[i] = True
                continue
        undecided[left] = i
        left += 1
    return left
