"""The excess test's compiled pass gives the numpy form's excess area to the bit.

Reference: ``excess._measure_excess_area_numpy``, the excess test written with numpy and
``scipy.special.gammainc`` (via ``poisson_tail_below``) and scipy's ``uniform_filter`` /
``maximum_filter`` steps (``window_sums``), as the quality measurement computed it before.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from plexwash.qc.quality import excess
from plexwash.qc.quality.settings import QualitySettings
from scipy import optimize, special


def _cases(rng, count):
    for t in range(count):
        shape = (int(rng.integers(1, 30)), int(rng.integers(1, 30)))
        area = np.full(shape, 16.0)
        area[-1] = float(rng.integers(1, 16))
        mu = rng.gamma(1.0, 3.0, shape) * area / 16
        stain = 1 + (rng.random(shape) < 0.2) * rng.random(shape) * 3
        n = rng.poisson(mu * stain).astype(np.float64)
        if t % 3 == 0:
            n = n + rng.random(shape)  # compensated data: fractional counts
        yield n, mu, area


def test_compiled_excess_area_is_the_numpy_form():
    rng = np.random.default_rng(31)
    settings = QualitySettings()
    for n, mu, area in _cases(rng, 1500):
        assert (excess.measure_excess_area(n, mu, area, settings)
                == excess._measure_excess_area_numpy(n, mu, area, settings))


def test_counts_at_the_alpha_level_go_to_gammainc_as_before():
    """Counts solved for ``P(N >= n) = alpha`` (scipy.special.gammainc), nudged by a few ulps:
    the bounds cannot decide them, so gammainc does, in both forms."""
    rng = np.random.default_rng(32)
    settings = dataclasses.replace(QualitySettings(), min_excess=0.0)
    alpha = settings.empty_alpha
    for _ in range(60):
        shape = (int(rng.integers(1, 9)), int(rng.integers(1, 9)))
        mu = rng.gamma(2.0, 3.0, shape)
        n = np.array([optimize.brentq(lambda x, m=m: special.gammainc(x, m) - alpha,
                                      m + 1e-9, 50 * m + 200) for m in mu.ravel()])
        n = n.reshape(shape) * (1 + rng.normal(0, 1e-13, shape))
        area = rng.integers(1, 17, shape).astype(np.float64)
        got = excess.measure_excess_area(n, mu, area, settings)
        assert got == excess._measure_excess_area_numpy(n, mu, area, settings)


def test_values_that_are_not_finite_take_the_numpy_form():
    settings = QualitySettings()
    n = np.full((4, 4), 50.0)
    n[1, 1] = np.inf
    mu = np.ones((4, 4))
    area = np.full((4, 4), 16.0)
    with np.errstate(invalid="ignore"):  # inf - inf in the window sums, as before
        assert (excess.measure_excess_area(n, mu, area, settings)
                == excess._measure_excess_area_numpy(n, mu, area, settings))
