"""Tables of the speckle step's chain rule (see :func:`chain_tables`; kernel ``_growth_kernels.keep_chains``).

A thin fibre that curves, in low background, leaves short runs of dropped pixels: each too dim
for the value test, too thin for the square windows, too bent for the straight lines. What sets
such a run apart from background is how many counts its positive pixels hold. Under background
alone (independent ``Poisson(level)`` counts) a positive pixel's count, given that it is
positive, follows the zero-truncated Poisson distribution (David & Johnson 1952), whatever its
neighbours are. So, given an 8-connected group of ``k`` dropped positive pixels, their summed
whole counts ``S`` follow the ``k``-fold sum of zero-truncated Poisson variables, whose law is
exact (Tate & Goen 1958: ``P(S = s) = k! S2(s, k) level^s / (s! (e^level - 1)^k)``, ``S2`` the
Stirling numbers of the second kind). The group is kept when ``P(S >= s) < chain_alpha``: a
conditional test, valid for every group whatever its shape, so its level is ``chain_alpha`` per
group.

References
----------
.. [1] F. N. David and N. L. Johnson, "The truncated Poisson", Biometrics 8(4):275-285, 1952.
.. [2] R. F. Tate and R. L. Goen, "Minimum variance unbiased estimation for the truncated
   Poisson distribution", Ann. Math. Statist. 29(3):755-765, 1958.
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["chain_tables", "with_chain_tables", "truncated_sum_tail"]

#: Largest whole count per pixel the sums are tabulated for; the tail beyond holds less than
#: ``1e-300`` of the mass for every level the rule is asked at (at most ``line_max_level``).
CHAIN_COUNT_LIMIT = 64
#: Sum given to a zone (or group size) where the rule is off: more than any group can hold.
CHAIN_OFF = np.int32(2**30)


def truncated_sum_tail(level: float, k: int, lowest: int = 1, limit: int = CHAIN_COUNT_LIMIT) -> np.ndarray:
    """``P(S >= s)`` for ``s = 0 .. k * limit``, ``S`` the sum of ``k`` independent Poisson(``level``)
    counts each conditioned on being at least ``lowest`` (the zero-truncated Poisson for
    ``lowest = 1``), by ``k``-fold convolution of the truncated probability mass function
    (``scipy.stats.poisson``)."""
    *_, tail = _truncated_sum_tails(level, k, lowest, limit)
    return tail


def _truncated_sum_tails(level: float, size: int, lowest: int = 1, limit: int = CHAIN_COUNT_LIMIT):
    """:func:`truncated_sum_tail` for ``k = 1 .. size`` in turn, each ``k``'s law convolved once
    more from the one before (the same sequence of convolutions as ``k`` separate calls make,
    so the same values, with one probability mass function for all ``k``)."""
    from scipy import stats  # here: scipy.stats costs a rerun's start-up about 0.4 s to import

    values = np.arange(limit + 1)
    pmf = stats.poisson.pmf(values, level)
    pmf[:lowest] = 0.0
    pmf /= stats.poisson.sf(lowest - 1, level)
    total = np.zeros(1)
    total[0] = 1.0
    for _ in range(size):
        total = np.convolve(total, pmf)
        yield np.minimum(np.cumsum(total[::-1])[::-1], 1.0)


def chain_tables(settings) -> tuple[np.ndarray, np.ndarray]:
    """The chain rule's background grid and thresholds for ``settings``.

    Returns ``grid`` (G,) float64, background means in counts per pixel from
    :data:`CHAIN_LOWEST_LEVEL` up to ``line_max_level`` in steps of ``1/16`` of a doubling, and
    ``table`` (G, K + 1) int32, ``K = chain_max``: the smallest summed whole count a group of
    ``k`` dropped positive pixels must hold to be kept at background ``grid[g]``
    (``P(S >= s) < chain_alpha``, :func:`truncated_sum_tail`); :data:`CHAIN_OFF` for ``k < 2``.
    A group's background is rounded up to the grid (the sum's tail grows with the mean: the
    rounding only makes the rule stricter). Shapes ``(0,)`` and ``(0, 0)`` when the rule is off
    (``chain_alpha`` 0 or ``chain_max`` under 2, or ``line_max_level`` below the grid).
    """
    return _chain_tables(float(settings.chain_alpha), int(settings.chain_max), float(settings.line_max_level),
                         int(np.floor(settings.threshold)) + 1)


#: Lowest background mean of the chain rule's grid (a sparser background is rounded up to it).
CHAIN_LOWEST_LEVEL = 1e-4
#: Grid steps per doubling of the background mean.
CHAIN_STEPS_PER_DOUBLING = 16


@functools.lru_cache(maxsize=8)
def _chain_tables(alpha: float, size: int, highest: float, lowest: int) -> tuple[np.ndarray, np.ndarray]:
    if alpha <= 0 or size < 2 or highest < CHAIN_LOWEST_LEVEL:
        return np.zeros(0, np.float64), np.zeros((0, 0), np.int32)
    steps = int(np.floor(np.log2(highest / CHAIN_LOWEST_LEVEL) * CHAIN_STEPS_PER_DOUBLING))
    grid = CHAIN_LOWEST_LEVEL * np.exp2(np.arange(steps + 1) / CHAIN_STEPS_PER_DOUBLING)
    table = np.full((grid.size, size + 1), CHAIN_OFF, np.int32)
    for g, level in enumerate(grid):
        for k, tail in enumerate(_truncated_sum_tails(float(level), size, lowest), start=1):
            if k >= 2 and tail[-1] < alpha:
                table[g, k] = int(np.argmax(tail < alpha))
    for array in (grid, table):
        array.flags.writeable = False
    return grid, table


def with_chain_tables(params: dict, settings) -> dict:
    """The speckle kernel's ``params`` with the chain rule's grid and table (``chain_grid``,
    ``chain_min``: :func:`chain_tables`) and its limits (``chain_max``, ``chain_contacts``) added."""
    params["chain_grid"], params["chain_min"] = chain_tables(settings)
    params["chain_max"] = int(settings.chain_max)
    params["chain_contacts"] = int(settings.chain_contacts)
    params["chain_alpha"] = float(settings.chain_alpha)
    params["chain_lowest"] = int(np.floor(settings.threshold)) + 1
    return params
