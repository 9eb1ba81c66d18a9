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
