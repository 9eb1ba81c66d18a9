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


def benjamini_hochberg(p_values, rate: float) -> np.ndarray:
    """Which hypotheses to reject at false discovery rate ``rate``: a bool array.

    The step-up procedure of Benjamini & Hochberg (J. R. Stat. Soc. B 57(1):289-300,
    1995): sort the ``m`` p-values, find the largest ``k`` with ``p_(k) <= k rate / m``,
    reject the ``k`` smallest. Reference check: rejects exactly where
    ``scipy.stats.false_discovery_control(p) <= rate``.

    Examples
    --------
    >>> benjamini_hochberg([0.001, 0.04, 0.03, 0.2], 0.05).tolist()
    [True, False, False, False]
    >>> benjamini_hochberg([0.01, 0.02, 0.03, 0.04], 0.05).tolist()
    [True, True, True, True]
    """
    p = np.asarray(p_values, np.float64).ravel()
    if not 0.0 < rate < 1.0:
        raise InputError("false_pair_rate", f"must be in (0, 1), got {rate!r}")
    m = p.size
    out = np.zeros(m, bool)
    if m == 0:
        return out
    order = np.argsort(p, kind="stable")
    passed = np.flatnonzero(p[order] <= rate * np.arange(1, m + 1) / m)
    if passed.size:
        out[order[: passed[-1] + 1]] = True
    return out
