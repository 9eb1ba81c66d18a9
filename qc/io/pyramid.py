"""Resolution levels of a washed stack: 2 x 2 block means, computed band by band.

Each level halves the one above until its longer side is at most ``SMALLEST_EDGE``
pixels. A level pixel is the mean of the 2 x 2 block of pixels above it
(``skimage.transform.downscale_local_mean`` with factors (1, 2, 2)); where the level above
has an odd number of rows or columns, the last row or column of the level is the mean of
the pixels present (1 or 2 of them), so a level covers the whole image and is
``ceil(n / 2)`` pixels on a side. Integer stacks round the mean to the nearest integer.

Levels are built from one channel's bands of whole rows of the level above, so memory
stays bounded by one band; each level holds a quarter of the pixels of the one above.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

#: The smallest level is at most this many pixels on its longer side.
SMALLEST_EDGE = 512
#: Rows of the level above read at once (even, so bands split into whole 2 x 2 blocks).
BAND_ROWS = 512


def level_shapes(shape: tuple[int, int, int]) -> list[tuple[int, int, int]]:
    """Shapes (C, Y, X) of every level, level 0 first.

    Examples
    --------
    >>> level_shapes((3, 1500, 1500))
    [(3, 1500, 1500), (3, 750, 750), (3, 375, 375)]
    >>> level_shapes((1, 300, 200))
    [(1, 300, 200)]
    """
    shapes = [tuple(int(n) for n in shape)]
    while max(shapes[-1][1:]) > SMALLEST_EDGE:
        c, y, x = shapes[-1]
        shapes.append((c, -(-y // 2), -(-x // 2)))
    return shapes


def halve(band: np.ndarray) -> np.ndarray:
    """2 x 2 block mean of a (C, Y, X) band, in the band's dtype (integers rounded).

    An odd trailing row or column is averaged over the pixels present.

    Examples
    --------
    >>> halve(np.array([[[1, 3, 5], [3, 5, 7]]], np.uint16))
    array([[[3, 6]]], dtype=uint16)
    """
    band = np.asarray(band)
    _, n_y, n_x = band.shape
    work = band.astype(np.float64)
    if n_y % 2 or n_x % 2:  # repeat the last row / column: the mean is over the pixels present
        work = np.pad(work, ((0, 0), (0, n_y % 2), (0, n_x % 2)), mode="edge")
    c, y, x = work.shape
    mean = work.reshape(c, y // 2, 2, x // 2, 2).mean(axis=(2, 4))
    if np.dtype(band.dtype).kind in "ui":
        mean = np.rint(mean)
    return mean.astype(band.dtype)


def build_levels(level0, new_level: Callable[[tuple[int, int, int], np.dtype], object]) -> list:
    """Every level below ``level0``, each from the one above in bands of whole rows.

    ``level0`` and the levels ``new_level(shape, dtype)`` makes are array stores sliced
    ``[c0:c1, y0:y1, x0:x1]`` (numpy arrays, zarr arrays, staged stacks).
    """
    shapes = level_shapes(tuple(level0.shape))
    dtype = np.dtype(level0.dtype)
    levels = [level0]
    for shape in shapes[1:]:
        above, below = levels[-1], new_level(shape, dtype)
        n_c, n_y, n_x = above.shape
        for c in range(n_c):  # one channel's band at a time: a few MB whatever the channel count
            for y0 in range(0, n_y, BAND_ROWS):
                half = halve(np.asarray(above[c : c + 1, y0 : min(n_y, y0 + BAND_ROWS), 0:n_x]))
                below[c : c + 1, y0 // 2 : y0 // 2 + half.shape[1], 0 : shape[2]] = half
        levels.append(below)
    return levels[1:]
