"""The ghost fit's bounded least squares survives a Gram matrix that rounding made indefinite."""

from __future__ import annotations

import numpy as np
from plexwash.qc.quality import excess
from scipy import optimize


def test_slightly_indefinite_gram_gives_the_bounded_minimum():
    rng = np.random.default_rng(4)
    design = rng.random((3, 200))
    design[2] = design[1]  # two identical sources: G is singular ...
    gram = design @ design.T
    gram[1, 1] -= 1e-6 * gram[1, 1]  # ... and rounding pushed it just below positive definite
    assert np.linalg.eigvalsh(gram).min() < 0
    target = design.T @ np.array([0.3, 0.2, 0.1]) + rng.normal(0, 0.01, 200)
    cross = design @ target
    lower, upper = np.zeros(3), np.full(3, 0.5)
    coef = excess._box_least_squares(gram, cross, lower, upper)
    assert np.all(np.isfinite(coef)) and np.all(coef >= lower - 1e-12) and np.all(coef <= upper + 1e-12)
    # the fit explains the target as well as scipy's bounded least squares on the design itself
    # (scipy.optimize.lsq_linear, BVLS; the two identical sources share their weight)
    reference = optimize.lsq_linear(design.T, target, bounds=(lower, upper), method="bvls").x
    fitted, expected = design.T @ coef, design.T @ reference
    assert np.linalg.norm(fitted - target) <= np.linalg.norm(expected - target) * 1.01
