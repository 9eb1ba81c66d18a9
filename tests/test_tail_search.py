"""The exact shortcut of the Poisson tail tests (:func:`plexwash.qc._tail_search.tail_below`)."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc._tail_search import tail_below, tail_below_numpy
from plexwash.qc.background import poisson_upper_tail
from scipy import special


def _counts_and_means(seed: int):
    """Whole counts above, at and below their means over many orders of magnitude, counts near
    the cut, fractions, NaN, 0, infinities and values past the bounds' range (1e7)."""
    rng = np.random.default_rng(seed)
    mu = np.concatenate([10.0 ** rng.uniform(-8, 6.5, 6000), rng.uniform(0.01, 5.0, 4000)])
    n = np.floor(mu * rng.uniform(0.5, 6.0, mu.size) + rng.integers(0, 12, mu.size))
    n[::17] += 0.5  # not whole
    n[::29] = np.floor(mu[::29]) + 1.0  # just above the mean
    extra_n = np.array([np.nan, 3.0, np.inf, 2e7, 5.0, 0.0, 1.0, 1e7 - 1, 4.0])
    extra_mu = np.array([1.0, np.nan, 2.0, 1e6, 0.0, 0.0, 1e-301, 9e6, np.inf])
    return np.concatenate([n, extra_n]), np.concatenate([mu, extra_mu])


@pytest.mark.parametrize("alpha", [1e-12, 1e-6, 0.003, 0.05, 0.3])
@pytest.mark.parametrize("seed", [0, 1])
def test_compiled_bounds_equal_the_numpy_bounds_and_the_incomplete_gamma(alpha, seed):
    """The compiled bounds decide every entry as the numpy form they replaced (kept as the
    reference), and both as ``scipy.special.gammainc(n, mu) < alpha`` (the Poisson upper tail,
    Abramowitz & Stegun 6.5.2, 26.4.21) wherever it is defined."""
    n, mu = _counts_and_means(seed)
    with np.errstate(invalid="ignore", divide="ignore"):
        got = tail_below(n, mu, alpha, poisson_upper_tail)
        np.testing.assert_array_equal(got, tail_below_numpy(n, mu, alpha, poisson_upper_tail))
        defined = np.isfinite(n) & np.isfinite(mu) & (n >= 1) & (mu > 0)
        np.testing.assert_array_equal(got[defined], special.gammainc(n[defined], mu[defined]) < alpha)


def test_tail_below_keeps_the_shape_and_takes_scalars():
    n = np.array([[30.0, 1.0], [4.0, 12.0]])
    got = tail_below(n, 2.0, 1e-3, poisson_upper_tail)
    np.testing.assert_array_equal(got, tail_below_numpy(n, np.full(n.shape, 2.0), 1e-3, poisson_upper_tail))
    assert got.shape == (2, 2) and got[0, 0] and not got[0, 1]
