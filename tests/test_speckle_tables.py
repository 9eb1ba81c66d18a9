"""The vectorised Poisson cut equals the scalar search entry for entry (the scalar form is the
reference: both compare ``scipy.special.pdtrc`` tails, the Poisson upper tail)."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.steps.speckle_tests import line_offsets, poisson_min_value, poisson_min_values


@pytest.mark.parametrize("alpha", [1e-12, 1e-6, 0.003, 0.01, 0.2, 0.5])
def test_poisson_min_values_equal_the_scalar_search(alpha):
    rng = np.random.default_rng(7)
    levels = np.concatenate([rng.exponential(0.2, 300), rng.exponential(20.0, 100), rng.uniform(0, 1e4, 20),
                             [0.0, 1e-300, 1e-9, 0.5, 1.0, 3.0, np.inf, -np.inf, np.nan]])
    expected = np.array([poisson_min_value(v, alpha) for v in levels])
    got = poisson_min_values(levels, alpha)
    np.testing.assert_array_equal(got, expected)


def test_line_offsets_are_cached_and_read_only():
    first = line_offsets(4)
    assert line_offsets(4) is first and not first.flags.writeable
    assert first.shape[1:] == (8, 2)
