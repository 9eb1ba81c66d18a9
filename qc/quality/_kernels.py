"""Compiled kernels behind :mod:`plexwash.qc.quality` (numba).

Each works in one pass without temporaries the size of its input,
releases the GIL (``nogil``) and is cached on disk (``cache=True``).
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def suppress_spikes(image, ratio, excess, out):
    """Copy ``image`` into ``out`` (float64) with isolated spikes set to their neighbourhood.

    ``level`` is the second largest of the pixel's neighbours inside the image (8, fewer
    at the edges; a missing neighbour counts as minus infinity), floored at 0. A pixel
    is a spike when ``v > ratio * level``, ``v - level >= excess`` and ``v > 0``; it
    becomes ``level``. Detection reads the input only. Returns the number of spikes.
    """
    height, width = image.shape
    count = 0
    for y in range(height):
        for x in range(width):
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
            level = max(second, 0.0)
            v = np.float64(image[y, x])
            if v > level * ratio and v - level >= excess and v > 0:
                out[y, x] = level
                count += 1
            else:
                out[y, x] = v
    return count


@nb.njit(cache=True, nogil=True)
def masked_mean_std(values, mask, inside):
    """Mean and standard deviation of the pixels where ``mask == inside`` (two passes, float64)."""
    height, width = values.shape
    n = 0
    total = 0.0
    for y in range(height):
        for x in range(width):
            if mask[y, x] == inside:
                total += values[y, x]
                n += 1
    if n == 0:
        return np.nan, np.nan
    mean = total / n
    squares = 0.0
    for y in range(height):
        for x in range(width):
            if mask[y, x] == inside:
                d = values[y, x] - mean
                squares += d * d
    return mean, np.sqrt(squares / n)


@nb.njit(cache=True, nogil=True)
def poisson_tail_screen(n, mu, log_alpha, out):
    """Sort bins for the test ``P(N >= n) < alpha``, N ~ Poisson(mu), by cheap bounds.

    ``out[i]`` becomes 0 (not below: ``n <= mu + sqrt(mu)`` or the series lower bound is
    at least ``alpha``), 1 (below: the Chernoff upper bound is under ``alpha``) or 2
    (undecided: the caller asks ``gammainc``). See ``quality._poisson_tail_below``.
    """
    for i in range(n.size):
        ni = n[i]
        mi = mu[i]
        if not ni > mi + np.sqrt(mi):
            out[i] = 0
            continue
        log_mu = np.log(mi)
        upper = -(ni * (np.log(ni) - log_mu) - ni + mi)
        if upper < log_alpha - 1e-9:
            out[i] = 1
            continue
        series = 1.0 + mi / (ni + 1.0) * (1.0 + mi / (ni + 2.0))
        lower = ni * log_mu - mi - math.lgamma(ni + 1.0) + np.log(series)
        out[i] = 0 if lower >= log_alpha + 1e-9 else 2
