"""Compiled kernels behind :mod:`plexwash.qc.staging` (numba)."""

from __future__ import annotations

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def removed_and_input_sums(before, after):
    """Per channel of (C, y, x) float32 pieces: ``sum(before - after)`` and ``sum(before)``.

    One pass, float64 accumulators, no temporary the size of the piece.
    """
    n_c, n_y, n_x = before.shape
    removed = np.zeros(n_c)
    total = np.zeros(n_c)
    for c in range(n_c):
        r = 0.0
        t = 0.0
        for y in range(n_y):
            for x in range(n_x):
                b = np.float64(before[c, y, x])
                r += b - np.float64(after[c, y, x])
                t += b
        removed[c] = r
        total[c] = t
    return removed, total
