"""Compiled kernels of the plane steps (numba, exact float32 arithmetic).

Used by :mod:`plexwash.qc.steps.hot_pixels` and :mod:`plexwash.qc.steps.speckle`.

Every kernel works on one 2-D float32 channel, releases the GIL (``nogil``) so that
channels or dask blocks run in parallel threads, and is cached on disk (``cache=True``).
``fastmath`` stays off: results must equal the scipy references bit for bit.

Edges are the array's edges. For the hot-pixel rule they are mirrored (scipy's
``mode='mirror'``: the edge pixel is not its own neighbour); for window counts the window
is clipped to the array. Under ``dask.array.map_overlap`` with ``boundary='none'`` an
array edge is either the image edge (same result as numpy) or lies in the overlap that
is trimmed away.
"""

from __future__ import annotations

import numba as nb
import numpy as np

#: Pixel states inside :func:`speckle_filter`.
_NOT_POSITIVE = 0
_DROPPED = 1  # positive, failed both tests and is not next to a core pixel
_KEPT = 2  # kept by its own value or as a neighbour of a core pixel
_CORE = 3  # kept by the local-density test
_LONE = 4  # kept, and bright enough to be kept even alone (see ``lone_cut``)


@nb.njit(cache=True, nogil=True)
def hot_pixels(image, ratio, min_excess, flat_sigmas, out, removed):
    """Detect and restore hot pixels of one channel; return how many were restored.

    A pixel with value ``v`` whose brightest neighbour is ``m1`` is hot when
    ``v - m1 >= min_excess`` and either ``v > ratio * max(m1, 0)``, or (when
    ``flat_sigmas > 0``) its surroundings are flat and its excess is not Poisson noise:
    ``m1 - m2 <= s * sqrt(m1 + m2)`` and ``v - m1 > s * sqrt(v + m1)``, with ``m2`` the
    brightest pixel at distance 2 and ``s = flat_sigmas``. Edges are mirrored.
    ``out`` and ``removed`` (float32, same shape) are filled completely.
    """
    height, width = image.shape
    count = 0
    ring = np.empty(8, np.float32)
    for y in range(height):
        ym = y - 1 if y > 0 else 1
        yp = y + 1 if y < height - 1 else height - 2
        above, row, below = image[ym], image[y], image[yp]
        for x in range(width):
            xm = x - 1 if x > 0 else 1
            xp = x + 1 if x < width - 1 else width - 2
            v = row[x]
            top = max(above[xm], above[x], above[xp], row[xm])
            bottom = max(row[xp], below[xm], below[x], below[xp])
            peak = np.float64(max(top, bottom))
            hot = False
            if v - peak >= min_excess:  # rare: only candidates pay for the rest
                if v > ratio * max(peak, 0.0):
                    hot = True
                elif flat_sigmas > 0.0 and v - peak > flat_sigmas * np.sqrt(max(v + peak, 0.0)):
                    outer = _ring2_max(image, y, x)
                    hot = peak - outer <= flat_sigmas * np.sqrt(max(peak + outer, 0.0))
            if hot:
                ring[0] = above[xm]
                ring[1] = above[x]
                ring[2] = above[xp]
                ring[3] = row[xm]
                ring[4] = row[xp]
                ring[5] = below[xm]
                ring[6] = below[x]
                ring[7] = below[xp]
                med = _low_median8(ring)
                out[y, x] = med
                removed[y, x] = v - med
                count += 1
            else:
                out[y, x] = v
                removed[y, x] = 0.0
    return count


@nb.njit(cache=True, nogil=True)
def _mirror(i, n):
    """Index ``i`` reflected into ``0..n-1`` without repeating the edge (scipy's ``'mirror'``)."""
    if i < 0:
        return -i
    if i >= n:
        return 2 * n - 2 - i
    return i


@nb.njit(cache=True, nogil=True)
def _ring2_max(image, y, x):
    """Brightest of the 16 pixels at Chebyshev distance 2 from (y, x), edges mirrored."""
    height, width = image.shape
    best = -np.inf
    for d in range(-2, 3):
        for yy, xx in ((y - 2, x + d), (y + 2, x + d)):
            best = max(best, np.float64(image[_mirror(yy, height), _mirror(xx, width)]))
        if -2 < d < 2:
            for yy, xx in ((y + d, x - 2), (y + d, x + 2)):
                best = max(best, np.float64(image[_mirror(yy, height), _mirror(xx, width)]))
    return best


@nb.njit(cache=True, nogil=True)
def _low_median8(values):
    """Low median of 8 values: the element of rank 3 (0-based), the dimmer of the two middle ones."""
    for i in range(1, 8):  # insertion sort: 8 values, only run for detected pixels
        key = values[i]
        j = i - 1
        while j >= 0 and values[j] > key:
            values[j + 1] = values[j]
            j -= 1
        values[j + 1] = key
    return values[3]


@nb.njit(cache=True, nogil=True)
def window_counts(image, threshold, radius, counts, upper=np.inf):
    """Number of pixels ``> threshold`` (and ``<= upper``) in the (2r+1)^2 window around each
    pixel, centre included.

    Running sums down the columns, then along each row: the cost does not depend on
    ``radius``. Windows are clipped to the array. ``counts`` is uint16.
    """
    height, width = image.shape
    column = np.zeros(width, np.int32)
    for y in range(min(radius, height - 1) + 1):
        for x in range(width):
            if threshold < image[y, x] <= upper:
                column[x] += 1
    for y in range(height):
        total = 0
        for x in range(min(radius, width - 1) + 1):
            total += column[x]
        for x in range(width):
            counts[y, x] = total
            right = x + 1 + radius
            left = x - radius
            if right < width:
                total += column[right]
            if left >= 0:
                total -= column[left]
        entering = y + 1 + radius
        leaving = y - radius
        if entering < height:
            row = image[entering]
            for x in range(width):
                if threshold < row[x] <= upper:
                    column[x] += 1
        if leaving >= 0 and y + 1 < height:
            row = image[leaving]
            for x in range(width):
                if threshold < row[x] <= upper:
                    column[x] -= 1


@nb.njit(cache=True, nogil=True)
def centre_histogram(image, counts, threshold, radius, histogram):
    """Add full windows to ``histogram[c, n]`` (int64, 2 x (2r+1)^2).

    ``c`` = 1 when the centre is ``> threshold``; ``n`` = positive neighbours. Only windows
    wholly inside the array count.
    """
    height, width = counts.shape
    for y in range(radius, height - radius):
        for x in range(radius, width - radius):
            centre = 1 if image[y, x] > threshold else 0
            histogram[centre, np.int64(counts[y, x]) - centre] += 1


@nb.njit(cache=True, nogil=True)
def speckle_filter(image, counts, wide, line_offsets, line_upper, line_min_count, line_flank, line_flank_min, zone, threshold, radius, min_count, wide_radius, wide_min_count,
                   support_min_count, value_cut, low_mean, keep_touching, min_area, lone_cut, rim_min_count,
                   rim_value, out, removed):
    """Local-density speckle filter of one channel; return how many pixels were set to 0.

    Parameters (all arrays C-contiguous)
    ----------
    image : float32 (H, W)
    counts : uint16 (H, W), from :func:`window_counts` (centre included)
    threshold : float32, a pixel is positive when ``value > threshold``
    wide : uint16 (H, W), :func:`window_counts` with ``wide_radius``
    line_offsets, line_upper, line_min_count, line_flank, line_flank_min : the line test of
        :func:`line_sum_dense` (offsets (O, 2 * half, 2), O = 0 for off; ``upper``; tables
        (Z, 2, T + 1); flank distance; flank table), asked only of a positive pixel no other
        rule makes dense; a pixel on such a line is dense
    zone : uint8 (H, W), the background zone of each pixel (indexes the tables below)
    radius : int, window half-width
    min_count : int32 (Z, 2r+2, 2r+2); ``min_count[z, a, b]`` = smallest neighbour count kept
        in zone ``z`` for a window clipped to ``a`` rows and ``b`` columns
    wide_radius : int, half-width of the wide window
    wide_min_count, support_min_count : int32 (Z, 2R+2, 2R+2) and (Z, 2r+2, 2r+2); a pixel is
        also dense when its wide window holds at least ``wide_min_count`` positive neighbours
        and its own window at least ``support_min_count``
    value_cut : float64 (Z,); a positive pixel with ``value > value_cut[zone]`` is kept by value
    low_mean : float64 (V + 1,); a dense pixel of value ``v <= V`` whose 8 neighbours (those
        inside the array) have a mean above ``low_mean[floor(v)]`` is too low for their
        structure and is not kept by density
    keep_touching : bool; also keep positive pixels touching a core pixel (DBSCAN border points)
    min_area : int; kept 8-connected components smaller than this are dropped, unless one of
        their pixels has ``value > lone_cut[zone]``
    lone_cut : float64 (Z,)
    rim_min_count : int32 (Z, (2r+1)^2) or (Z, 0) for off; a pixel dense in its own window that has
        bright neighbours (``> value_cut``) which are fewer than half its neighbours is judged on
        the rest: dense only with at least ``rim_min_count[z, m]`` dim positive pixels among the
        ``m`` neighbours that are not bright (the rim rule; no wide-window rescue then), when its
        own value is at most ``rim_value[z]`` (consistent with background)
    out, removed : float32 (H, W), filled completely
    """
    height, width = image.shape
    state = np.zeros((height, width), np.uint8)
    line_possible = _line_possible(line_offsets, line_upper, line_min_count)
    for y in range(height):
        rows = min(height - 1, y + radius) - max(0, y - radius) + 1
        for x in range(width):
            v = image[y, x]
            if v > threshold:
                cols = min(width - 1, x + radius) - max(0, x - radius) + 1
                z = zone[y, x]
                n = np.int32(counts[y, x]) - 1
                dense = n >= min_count[z, rows, cols]
                rimmed = False
                if dense and rim_min_count.shape[1] > 0 and v <= rim_value[z]:
                    rimmed, dense = _rim_dense(image, y, x, threshold, value_cut[z], radius, rim_min_count[z])
                if not dense and not rimmed and n >= support_min_count[z, rows, cols]:
                    wrows = min(height - 1, y + wide_radius) - max(0, y - wide_radius) + 1
                    wcols = min(width - 1, x + wide_radius) - max(0, x - wide_radius) + 1
                    dense = np.int32(wide[y, x]) - 1 >= wide_min_count[z, wrows, wcols]
                if not dense and line_possible[z] and _on_line_sum(
                        image, y, x, threshold, line_upper, line_offsets, line_min_count[z], line_flank, line_flank_min):
                    dense = True
                if dense and not _below_neighbours(image, y, x, v, low_mean):
                    state[y, x] = _CORE
                elif v > value_cut[z]:
                    state[y, x] = _KEPT
                else:
                    state[y, x] = _DROPPED
    if keep_touching:  # DBSCAN border points at distance 1: positive pixels touching a core pixel
        _keep_touching(state)
    if min_area > 1:
        for y in range(height):
            for x in range(width):
                if state[y, x] >= _KEPT and image[y, x] > lone_cut[zone[y, x]]:
                    state[y, x] = _LONE
        if min_area == 2:
            _drop_isolated(state)
        else:
            _drop_small_components(state, min_area)
    n_removed = 0
    for y in range(height):
        for x in range(width):
            v = image[y, x]
            if state[y, x] == _DROPPED:
                out[y, x] = 0.0
                removed[y, x] = v
                n_removed += 1
            else:
                out[y, x] = v
                removed[y, x] = 0.0
    return n_removed


@nb.njit(cache=True, nogil=True)
def _line_possible(offsets, upper, tables):
    """Per zone, whether :func:`_on_line_sum` can find a dense line there (its first check,
    which depends on the zone's table alone): False for every zone when there are no lines."""
    possible = np.zeros(tables.shape[0], np.bool_)
    if offsets.shape[0] == 0:
        return possible
    length = offsets.shape[1]
    brightest = np.floor(np.float64(upper) + 0.5)
    for z in range(tables.shape[0]):
        for t in range(length + 1):
            if tables[z, 0, t] <= t * brightest:
                possible[z] = True
                break
    return possible


@nb.njit(cache=True, nogil=True)
def _rim_dense(image, y, x, threshold, cut, radius, table):
    """``(judged, dense)`` of the rim rule for (y, x): judged when some but fewer than half of the
    window's neighbours are bright (``> cut``); then dense when the dim positive neighbours among
    the ``m`` others reach ``table[m]``."""
    height, width = image.shape
    bright = 0
    dim = 0
    total = 0
    for yy in range(max(0, y - radius), min(height, y + radius + 1)):
        for xx in range(max(0, x - radius), min(width, x + radius + 1)):
            if yy != y or xx != x:
                total += 1
                u = image[yy, xx]
                if u > cut:
                    bright += 1
                elif u > threshold:
                    dim += 1
    rest = total - bright
    if bright == 0 or 2 * rest < total:
        return False, True
    return True, dim >= table[rest]


@nb.njit(cache=True, nogil=True)
def _below_neighbours(image, y, x, v, low_mean):
    """Whether ``v`` is improbably low for the mean of the 8 neighbours of (y, x) (see ``low_mean``)."""
    k = np.int64(np.floor(np.float64(v)))
    if k >= low_mean.shape[0]:
        return False
    height, width = image.shape
    total = 0.0
    n = 0
    for yy in range(max(0, y - 1), min(height, y + 2)):
        for xx in range(max(0, x - 1), min(width, x + 2)):
            if yy != y or xx != x:
                total += np.float64(image[yy, xx])
                n += 1
    return n > 0 and total > low_mean[k] * n


@nb.njit(cache=True, nogil=True)
def _keep_touching(state):
    """Mark dropped positive pixels that touch (8-connected) a core pixel as kept."""
    height, width = state.shape
    for y in range(height):
        for x in range(width):
            if state[y, x] == _DROPPED:
                for yy in range(max(0, y - 1), min(height, y + 2)):
                    for xx in range(max(0, x - 1), min(width, x + 2)):
                        if state[yy, xx] == _CORE:
                            state[y, x] = _KEPT


@nb.njit(cache=True, nogil=True)
def _drop_isolated(state):
    """:func:`_drop_small_components` with ``min_area`` 2: a component of one pixel is a kept pixel
    with no kept 8-neighbour, dropped unless it is ``_LONE`` (a dropped pixel had no kept
    neighbour, so dropping it changes no other pixel's answer)."""
    height, width = state.shape
    for y in range(height):
        for x in range(width):
            if state[y, x] == _KEPT or state[y, x] == _CORE:
                alone = True
                for yy in range(max(0, y - 1), min(height, y + 2)):
                    for xx in range(max(0, x - 1), min(width, x + 2)):
                        if (yy != y or xx != x) and state[yy, xx] >= _KEPT:
                            alone = False
                if alone:
                    state[y, x] = _DROPPED


@nb.njit(cache=True, nogil=True)
def _find(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]  # path halving
        i = parent[i]
    return i


@nb.njit(cache=True, nogil=True)
def _union(parent, i, j):
    ri = _find(parent, i)
    rj = _find(parent, j)
    if ri < rj:
        parent[rj] = ri
    elif rj < ri:
        parent[ri] = rj


@nb.njit(cache=True, nogil=True)
def _drop_small_components(state, min_area):
    """Mark kept pixels of 8-connected components smaller than ``min_area`` as dropped,
    unless the component holds a ``_LONE`` pixel.

    Two-pass labelling: provisional labels linked by union-find (neighbours W, NW, N, NE),
    then sizes per root. Labels are compact, so ``parent`` stays small and cached.
    """
    height, width = state.shape
    labels = np.empty((height, width), np.int32)  # read only where state is kept
    parent = np.empty(height * (width + 1) // 2 + 2, np.int32)  # bound on new labels
    n_labels = 0
    for y in range(height):
        for x in range(width):
            if state[y, x] < _KEPT:
                continue
            label = -1
            if x > 0 and state[y, x - 1] >= _KEPT:
                label = labels[y, x - 1]
            if y > 0:
                for xx in range(max(0, x - 1), min(width, x + 2)):
                    if state[y - 1, xx] >= _KEPT:
                        if label < 0:
                            label = labels[y - 1, xx]
                        else:
                            _union(parent, label, labels[y - 1, xx])
            if label < 0:
                label = n_labels
                parent[label] = label
                n_labels += 1
            labels[y, x] = label
    size = np.zeros(n_labels, np.int32)
    lone = np.zeros(n_labels, np.bool_)
    for label in range(n_labels):
        parent[label] = _find(parent, label)
    for y in range(height):
        for x in range(width):
            if state[y, x] >= _KEPT:
                root = parent[labels[y, x]]
                size[root] += 1
                lone[root] |= state[y, x] == _LONE  # keeps its component whatever its size
    for y in range(height):
        for x in range(width):
            if state[y, x] >= _KEPT:
                root = parent[labels[y, x]]
                if size[root] < min_area and not lone[root]:
                    state[y, x] = _DROPPED


@nb.njit(cache=True, nogil=True)
def line_sum_dense(image, threshold, upper, offsets, zone, line_min_sum, flank, flank_min, out):
    """Mark positive pixels through which a dense line of dim counts passes (uint8 ``out``; see
    :func:`_on_line_sum`, ``table`` = ``line_min_sum[zone]``). :func:`speckle_filter` asks the
    same question only of the pixels no other rule keeps (the line test of the speckle step,
    :func:`plexwash.qc.steps.speckle_tests.line_sum_tables` and ``line_flank_table``)."""
    height, width = image.shape
    for y in range(height):
        for x in range(width):
            out[y, x] = 0
            if image[y, x] > threshold and _on_line_sum(image, y, x, threshold, upper, offsets,
                                                        line_min_sum[zone[y, x]], flank, flank_min):
                out[y, x] = 1


@nb.njit(cache=True, nogil=True)
def _whole(v):
    """A value rounded to whole counts (half up)."""
    return np.floor(np.float64(v) + 0.5)


@nb.njit(cache=True, nogil=True)
def _flank_sum(image, y, x, offsets, o, shift_y, shift_x):
    """Whole counts and pixels inside the image of line ``o`` moved by (shift_y, shift_x)."""
    height, width = image.shape
    total = 0.0
    pixels = 0
    for k in range(offsets.shape[1]):
        yy = y + offsets[o, k, 0] + shift_y
        xx = x + offsets[o, k, 1] + shift_x
        if 0 <= yy < height and 0 <= xx < width:
            total += _whole(image[yy, xx])
            pixels += 1
    return total, pixels


@nb.njit(cache=True, nogil=True)
def _dim_sum(image, y, x, threshold, upper, offsets, o, first, stop, inside):
    """Whole counts of the dim positive pixels (``threshold < v <= upper``) on line ``o``'s
    pixels ``first`` to ``stop - 1`` through (y, x), and how many of those pixels lie inside
    the image (all of them when ``inside``)."""
    height, width = image.shape
    total = 0.0
    pixels = 0
    for k in range(first, stop):
        yy = y + offsets[o, k, 0]
        xx = x + offsets[o, k, 1]
        if inside or (0 <= yy < height and 0 <= xx < width):
            pixels += 1
            v = image[yy, xx]
            if threshold < v <= upper:
                total += _whole(v)
    return total, pixels


@nb.njit(cache=True, nogil=True)
def _on_line_sum(image, y, x, threshold, upper, offsets, table, flank, flank_min):
    """Whether some line through (y, x) is dense.

    On the line's ``t`` pixels inside the image the dim positive values (``threshold < v <=
    upper``), each rounded to whole counts, sum to ``s`` (``a`` and ``b`` on its halves of
    ``h`` pixels). The line is dense when both halves hold a dim positive pixel, ``s >=
    table[0, t]``, ``a >= table[1, h_a]``, ``b >= table[1, h_b]`` and, for each of the two
    parallel lines ``flank`` pixels away across it (``f`` pixels inside the image, ``n`` whole
    counts of any value), ``s >= flank_min[t, f, s + n]`` (not dense when ``s + n`` lies beyond
    the table's last axis; no flank test when ``flank_min`` is empty).
    """
    height, width = image.shape
    n_lines, length, _ = offsets.shape
    half = length // 2
    inside = half <= y < height - half and half <= x < width - half
    brightest = np.floor(np.float64(upper) + 0.5)
    possible = False  # some line length t whose sum a line of the brightest dim pixels reaches
    for t in range(length + 1):
        if table[0, t] <= t * brightest:
            possible = True
            break
    if not possible:
        return False
    for o in range(n_lines):
        # the first half: the line is given up when it fails the side test
        ahead, n_ahead = _dim_sum(image, y, x, threshold, upper, offsets, o, 0, half, inside)
        if ahead <= 0.0 or ahead < table[1, n_ahead]:
            continue
        behind, n_behind = _dim_sum(image, y, x, threshold, upper, offsets, o, half, length, inside)
        total = ahead + behind
        if not (ahead > 0.0 and behind > 0.0 and ahead >= table[1, n_ahead] and behind >= table[1, n_behind]
                and total >= table[0, n_ahead + n_behind]):
            continue
        if _denser_than_flanks(image, y, x, offsets, o, half, flank, total, n_ahead + n_behind, flank_min):
            return True
    return False


@nb.njit(cache=True, nogil=True)
def _denser_than_flanks(image, y, x, offsets, o, half, flank, total, dim, flank_min):
    """The flank test of line ``o`` through ``(y, x)`` (``total`` counts on ``dim`` dim pixels):
    denser than the parallel line ``flank`` px to either side (always, with no flank table)."""
    if flank_min.shape[0] == 0:
        return True
    steep = abs(offsets[o, half - 1, 0]) == half  # one pixel per row: the flanks lie across x
    for side in (-1, 1):
        sy = 0 if steep else side * flank
        sx = side * flank if steep else 0
        other, pixels = _flank_sum(image, y, x, offsets, o, sy, sx)
        n = np.int64(total + other)
        if n >= flank_min.shape[2] or total < flank_min[dim, pixels, n]:
            return False
    return True
