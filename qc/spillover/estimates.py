"""What both estimators share: the bootstrap settings check and the rounded result."""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .matrix import SpilloverMatrix

#: Estimates are rounded to this many decimals (1e-4 %): far below their uncertainty,
#: and it keeps the CSV readable.
_ESTIMATE_DECIMALS = 6


def rounded_estimate(channels, values, low, high) -> SpilloverMatrix:
    """The estimate as a matrix, rounded, with its interval widened to contain it."""

    def r(a):
        return np.round(a, _ESTIMATE_DECIMALS) + 0.0  # + 0.0 turns -0.0 into 0.0

    return SpilloverMatrix(channels, r(values), np.minimum(r(low), r(values)), np.maximum(r(high), r(values)))


def check_bootstrap(n_boot, level, block) -> None:
    """Refuse bootstrap settings an estimator cannot use (replicates, interval level, block)."""
    if not (isinstance(n_boot, (int, np.integer)) and n_boot >= 10):
        raise InputError("n_boot", f"need at least 10 bootstrap replicates, got {n_boot!r}")
    if not 0.5 <= level < 1.0:
        raise InputError("level", f"interval level must be in [0.5, 1), got {level!r}")
    if not (isinstance(block, (int, np.integer)) and block >= 2):
        raise InputError("block", f"block must be an integer >= 2 pixels, got {block!r}")
