"""Compiled kernels of the speckle step's growth rules (numba, exact float32 arithmetic).

Run after :func:`plexwash.qc.steps._kernels.speckle_filter` on its ``out`` and ``removed``:
the line-end rule (:func:`extend_lines`) and the area rule (:func:`keep_areas`). Like the
other plane kernels they release the GIL and are cached on disk.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from ._kernels import _denser_than_flanks, _dim_sum, _whole


@nb.njit(cache=True, nogil=True)
def extend_lines(image, out, removed, threshold, upper, offsets, zone, line_min_sum, flank, flank_min, passes):
    """Keep the dropped dim pixels that continue a kept line; return how many were kept again.

    The end rule of the speckle step's line test, run after :func:`._kernels.speckle_filter` on its
    ``out`` and ``removed`` (float32, updated in place): a dropped dim positive pixel
    (``threshold < v <= upper``, ``removed > 0``) is kept when its own whole count passes the
    side test as a half of one pixel (``line_min_sum[zone, 1, 1]``: a background count past a
    fibre's end is mostly a single count, a fibre's is not), one or two of its 8 neighbours are
    kept (``out > threshold``: a structure's end has it on one side, a pixel beside a cell has
    more), and, on some line through it, its neighbour on one half is kept and the line passes
    the line test with the side test asked of that half alone (the other half lies past the
    structure's end, so it may hold background only): see :func:`_extends_line`. ``passes`` rounds, each judged on
    the kept pixels of the round before, so a line grows by at most one pixel per round and
    the result does not depend on the order of the pixels.
    """
    height, width = image.shape
    kept = np.empty((height, width), np.bool_)
    for y in range(height):
        for x in range(width):
            kept[y, x] = out[y, x] > threshold
    # a pixel's verdict changes only when one of its 8 neighbours changed: after the first round
    # only the neighbours of the pixels kept in the round before are judged again
    fresh = np.ones((height, width), np.bool_)
    now = np.zeros((height, width), np.bool_)
    total = 0
    for _ in range(passes):
        restored = 0
        for y in range(height):
            for x in range(width):
                v = image[y, x]
                if removed[y, x] > 0.0 and threshold < v <= upper and _whole(v) >= line_min_sum[zone[y, x], 1, 1] \
                        and _near(fresh, y, x) and 1 <= _kept_around(kept, y, x) <= 2 and _extends_line(
                            image, kept, y, x, threshold, upper, offsets, line_min_sum[zone[y, x]], flank, flank_min):
                    now[y, x] = True
                    restored += 1
        total += restored
        if restored == 0:
            break
        for y in range(height):
            for x in range(width):
                fresh[y, x] = now[y, x]
                if now[y, x]:
                    kept[y, x] = True
                    out[y, x] = image[y, x]
                    removed[y, x] = 0.0
                    now[y, x] = False
    return total


@nb.njit(cache=True, nogil=True)
def _near(marks, y, x):
    """Whether (y, x) or one of its 8 neighbours is marked."""
    height, width = marks.shape
    for yy in range(max(0, y - 1), min(height, y + 2)):
        for xx in range(max(0, x - 1), min(width, x + 2)):
            if marks[yy, xx]:
                return True
    return False


@nb.njit(cache=True, nogil=True)
def _kept_around(kept, y, x):
    """How many of the 8 neighbours of (y, x) inside the array are kept."""
    height, width = kept.shape
    n = 0
    for yy in range(max(0, y - 1), min(height, y + 2)):
        for xx in range(max(0, x - 1), min(width, x + 2)):
            if (yy != y or xx != x) and kept[yy, xx]:
                n += 1
    return n


@nb.njit(cache=True, nogil=True)
def _extends_line(image, kept, y, x, threshold, upper, offsets, table, flank, flank_min):
    """Whether a line through (y, x) continues a kept structure: the line's first pixel on one
    half is kept, that half's dim sum passes the side test (``table[1]``), the whole line's sum
    the line test (``table[0]``) and the flank test (as in :func:`._kernels._on_line_sum`); the other half
    is not asked to hold anything."""
    height, width = image.shape
    n_lines, length, _ = offsets.shape
    half = length // 2
    inside = half <= y < height - half and half <= x < width - half
    for o in range(n_lines):
        for first in (0, half):
            ny = y + offsets[o, first, 0]
            nx = x + offsets[o, first, 1]
            if not (0 <= ny < height and 0 <= nx < width) or not kept[ny, nx]:
                continue
            ahead, n_ahead = _dim_sum(image, y, x, threshold, upper, offsets, o, first, first + half, inside)
            if ahead <= 0.0 or ahead < table[1, n_ahead]:
                continue
            other = half - first
            behind, n_behind = _dim_sum(image, y, x, threshold, upper, offsets, o, other, other + half, inside)
            total = ahead + behind
            if total < table[0, n_ahead + n_behind]:
                continue
            if _denser_than_flanks(image, y, x, offsets, o, half, flank, total, n_ahead + n_behind, flank_min):
                return True
    return False


@nb.njit(cache=True, nogil=True)
def keep_areas(image, wide, out, removed, threshold, upper, zone, radius, area_min, half_min):
    """Keep the dropped dim pixels that lie inside a dim area; return how many were kept again.

    The area rule of the speckle step, run after the other rules on their ``out`` and ``removed``
    (float32, updated in place): a dropped dim positive pixel (``threshold < v <= upper``,
    ``removed > 0``) is kept when its ``(2R+1)^2`` window holds at least ``area_min[z, a, b]`` dim
    positive neighbours (``wide``: :func:`._kernels.window_counts` with ``upper``, centre included; a window
    clipped to ``a`` x ``b`` pixels) and each of its four half windows (the rows above and
    below it, the columns left and right of it, the pixel's own row or column included) at least
    ``half_min[z, a, b]`` for its own clipped size: a pixel inside a dim stain, not beside one
    (there one half is background). Reads only ``image`` and ``wide``, so the result does not
    depend on the order of the pixels. Off when ``area_min`` has no rows.
    """
    height, width = image.shape
    if area_min.shape[0] == 0:
        return 0
    restored = 0
    for y in range(height):
        top, bottom = max(0, y - radius), min(height - 1, y + radius)
        for x in range(width):
            v = image[y, x]
            if removed[y, x] > 0.0 and threshold < v <= upper:
                z = zone[y, x]
                left, right = max(0, x - radius), min(width - 1, x + radius)
                if np.int32(wide[y, x]) - 1 >= area_min[z, bottom - top + 1, right - left + 1] and _dense_halves(
                        image, y, x, threshold, upper, top, bottom, left, right, half_min[z]):
                    out[y, x] = v
                    removed[y, x] = 0.0
                    restored += 1
    return restored


@nb.njit(cache=True, nogil=True)
def _dense_halves(image, y, x, threshold, upper, top, bottom, left, right, table):
    """Whether each half of the window ``top..bottom`` x ``left..right`` around (y, x) (rows up to
    and from ``y``, columns up to and from ``x``) holds at least ``table[a, b]`` dim positive
    pixels besides (y, x), ``a`` x ``b`` its size."""
    above = below = before = after = 0
    for yy in range(top, bottom + 1):
        for xx in range(left, right + 1):
            if yy == y and xx == x:
                continue
            u = image[yy, xx]
            if threshold < u <= upper:
                if yy <= y:
                    above += 1
                if yy >= y:
                    below += 1
                if xx <= x:
                    before += 1
                if xx >= x:
                    after += 1
    rows, cols = bottom - top + 1, right - left + 1
    return (above >= table[y - top + 1, cols] and below >= table[bottom - y + 1, cols]
            and before >= table[rows, x - left + 1] and after >= table[rows, right - x + 1])


@nb.njit(cache=True, nogil=True)
def keep_chains(image, out, removed, threshold, zone, levels, spilled, grid, chain_min, max_pixels, max_contacts,
                alpha, lowest):
    """Keep the groups of dropped positive pixels whose summed counts are improbable for background;
    return how many pixels were kept again.

    The chain rule of the speckle step, run last on the other rules' ``out`` and ``removed``
    (float32, updated in place): the dropped positive pixels (``removed > 0``, ``image >
    threshold``) are grouped 8-connected; a group of ``k`` pixels, ``2 <= k <= max_pixels``,
    touching at most ``max_contacts`` kept pixels (``out > threshold``), is kept when its summed
    whole counts ``s`` are improbable, ``P(S >= s) < alpha``, for ``S`` the sum of independent
    Poisson counts each at least ``lowest``, pixel ``i``'s mean its expected count
    ``levels[zone] + spilled`` (the background and the spillover compensation removed there); a
    group whose largest mean lies above the grid is not kept (see :mod:`.speckle_chains`). The
    tail grows with every mean, so ``chain_min`` (the smallest kept sum at each ``grid`` mean)
    decides at once a group that fails at its smallest mean rounded down or passes at its largest
    rounded up; the others get the exact tail (:func:`_chain_tail_below`). The groups are those of
    the input marks, so the result does not depend on the order of the pixels. Off when
    ``chain_min`` has no rows.
    """
    height, width = image.shape
    if chain_min.shape[0] == 0:
        return 0
    candidates = 0
    for y in range(height):
        for x in range(width):
            if removed[y, x] > 0.0 and image[y, x] > threshold:
                candidates += 1
    if candidates < 2:
        return 0
    seen = np.zeros((height, width), np.bool_)
    stamp = np.zeros((height, width), np.int32)  # the last group a kept pixel was counted for
    queue = np.empty(candidates, np.int64)
    restored = 0
    group = 0
    for y0 in range(height):
        for x0 in range(width):
            if seen[y0, x0] or not (removed[y0, x0] > 0.0 and image[y0, x0] > threshold):
                continue
            seen[y0, x0] = True
            queue[0] = y0 * width + x0
            head, tail, total, contacts, mean, least = 0, 1, 0.0, 0, 0.0, np.inf
            group += 1
            while head < tail:
                p = queue[head]
                head += 1
                y, x = p // width, p % width
                total += _whole(image[y, x])
                here = levels[zone[y, x]] + max(np.float64(spilled[y, x]), 0.0)
                mean = max(mean, here)
                least = min(least, here)
                for yy in range(max(0, y - 1), min(height, y + 2)):
                    for xx in range(max(0, x - 1), min(width, x + 2)):
                        if not seen[yy, xx] and removed[yy, xx] > 0.0 and image[yy, xx] > threshold:
                            seen[yy, xx] = True
                            queue[tail] = yy * width + xx
                            tail += 1
                        elif out[yy, xx] > threshold and stamp[yy, xx] != group:
                            stamp[yy, xx] = group
                            contacts += 1
            if tail < 2 or tail > max_pixels or contacts > max_contacts or not mean <= grid[grid.size - 1]:
                continue
            g = 0
            while grid[g] < mean:
                g += 1
            low = grid.size - 1
            while low > 0 and grid[low] > least:
                low -= 1
            if grid[low] > least or total < chain_min[low, tail]:
                continue  # improbable at no mean as low as the group's smallest
            keep = total >= chain_min[g, tail]
            if not keep:  # between the bounds: the exact tail of the group's own means
                means = np.empty(tail, np.float64)
                for i in range(tail):
                    y, x = queue[i] // width, queue[i] % width
                    means[i] = levels[zone[y, x]] + max(np.float64(spilled[y, x]), 0.0)
                keep = 1.0 - _chain_tail_below(means, int(total), lowest) < alpha
            if keep:
                for i in range(tail):
                    y, x = queue[i] // width, queue[i] % width
                    out[y, x] = image[y, x]
                    removed[y, x] = 0.0
                restored += tail
    return restored


@nb.njit(cache=True, nogil=True)
def _chain_tail_below(means, total, lowest):
    """``P(S < total)`` for ``S`` the sum of independent Poisson(``means[i]``) counts each
    conditioned on being at least ``lowest`` (zero-truncated Poisson for ``lowest = 1``, David &
    Johnson 1952), by convolution of the truncated laws up to ``total - 1``."""
    if total <= 0:
        return 0.0
    dist = np.zeros(total, np.float64)
    dist[0] = 1.0
    pmf = np.zeros(total, np.float64)
    for i in range(means.size):
        mu = means[i]
        below = 0.0  # P(Y < lowest)
        term = np.exp(-mu)
        for y in range(total):
            if y < lowest:
                below += term
                pmf[y] = 0.0
            else:
                pmf[y] = term
            term *= mu / (y + 1)
        kept = -np.expm1(-mu) if lowest == 1 else 1.0 - below
        nxt = np.zeros(total, np.float64)
        for a in range(total):
            if dist[a] == 0.0:
                continue
            for y in range(lowest, total - a):
                nxt[a + y] += dist[a] * pmf[y] / kept
        dist = nxt
    return dist.sum()
