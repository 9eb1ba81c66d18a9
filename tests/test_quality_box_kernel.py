"""The compiled box fit (``_box_kernels.box_fit``) returns the numpy form's bits.

Reference: ``excess._box_least_squares_numpy``, the box fit in numpy / LAPACK steps, which
``tests/test_quality_bvls.py`` checks against ``scipy.optimize.lsq_linear(method="bvls")``
and ``scipy.linalg.cholesky`` / ``solve_triangular``. The compiled loop calls the same
library routines, so every bit must agree, on the systems the ghost fits meet (Gram
matrices of count bins, some sources bounded, some fixed at 0) and on degenerate ones.
"""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.quality import _box_kernels, excess

pytestmark = pytest.mark.skipif(excess._ROUTINES is None,
                                reason="numpy's bundled OpenBLAS not found (numpy form runs)")


def _system(rng, t):
    k = int(rng.integers(2, 12))
    m = int(rng.integers(k, 60))
    design = rng.poisson(rng.uniform(0.5, 50, (k, 1)), (k, m)).astype(np.float64)
    if t % 7 == 0:
        design[1] = design[0] * 0.3  # a dependent source
    if t % 11 == 0:
        design[-1] = 0.0  # an all-zero source (fixed: no diagonal)
    target = rng.poisson((design.T @ rng.uniform(-0.5, 2, k)).clip(0) + 2).astype(np.float64)
    gram, cross = design @ design.T, design @ target
    lower = np.zeros(k)
    upper = np.full(k, np.inf) if t % 2 else rng.choice([0.0, 0.05, 2.0, np.inf], k)
    if t % 5 == 0:
        cross = cross - rng.uniform(0, 2, k) * np.abs(cross)  # pushed onto the bounds
    return gram, cross, lower, upper


def _bits(x):
    return np.asarray(x, np.float64).tobytes()


def test_compiled_box_fit_bit_for_bit():
    rng = np.random.default_rng(5)
    handed_back = bounded = 0
    for t in range(1500):
        gram, cross, lower, upper = _system(rng, t)
        ref = excess._box_least_squares_numpy(gram, cross, lower, upper)
        coef = np.empty(cross.size)
        status = _box_kernels.box_fit(gram, cross, lower, upper, excess._ROUTINES, coef)
        if status:
            handed_back += 1
            continue
        assert _bits(coef) == _bits(ref), t
        bounded += bool(np.any((coef == 0) & (upper > 0)))
    assert handed_back == 0
    assert bounded > 300  # many fits end on a bound: BVLS's active-set steps are exercised


def test_hand_back_cases_give_the_numpy_form():
    rng = np.random.default_rng(8)
    gram, cross, lower, upper = _system(rng, 1)
    cases = []
    fixed_lower = lower.copy()
    fixed_lower[0] = 0.5
    up = upper.copy()
    up[0] = 0.0
    cases.append((gram, cross, fixed_lower, up))  # a fixed part that is not +0
    negative = cross.copy()
    negative[1] = -0.0
    cases.append((gram, negative, lower, up))  # -0.0 - (+-0.0) depends on the zero's sign
    nan = cross.copy()
    nan[1] = np.nan
    cases.append((gram, nan, lower, upper))  # not finite
    cases.append((gram[:1, :1].copy(), cross[:1].copy(), lower[:1], upper[:1]))  # one unknown
    for args in cases:
        coef = np.empty(args[1].size)
        assert _box_kernels.box_fit(*args, excess._ROUTINES, coef) == 2
        with np.errstate(all="ignore"):
            assert _bits(excess._box_least_squares(*args)) == _bits(
                excess._box_least_squares_numpy(*args))


def test_fixed_part_over_negative_entries():
    # Gram matrices updated bin by bin can hold tiny negative entries: the fixed part
    # (coefficients 0) is then a sum of +0.0 and -0.0 products
    rng = np.random.default_rng(13)
    for t in range(300):
        gram, cross, lower, upper = _system(rng, 2 * t)
        upper[rng.integers(0, upper.size)] = 0.0
        gram = gram - rng.uniform(0, 1.5, gram.shape) * gram.mean()
        gram = (gram + gram.T) / 2
        gram[np.diag_indices_from(gram)] = np.abs(gram.diagonal()) + 1.0
        ref = excess._box_least_squares_numpy(gram, cross, lower, upper)
        coef = np.empty(cross.size)
        status = _box_kernels.box_fit(gram, cross, lower, upper, excess._ROUTINES, coef)
        if status == 0:
            assert _bits(coef) == _bits(ref), t
        else:
            assert _bits(excess._box_least_squares(gram, cross, lower, upper)) == _bits(ref)


def test_one_free_unknown_among_fixed():
    rng = np.random.default_rng(3)
    for t in range(200):
        gram, cross, lower, upper = _system(rng, 2 * t + 1)
        upper[1:] = 0.0
        upper[0] = rng.choice([0.05, np.inf])
        ref = excess._box_least_squares_numpy(gram, cross, lower, upper)
        assert _bits(excess._box_least_squares(gram, cross, lower, upper)) == _bits(ref)


def test_ghost_fit_rounds_unchanged(monkeypatch):
    # whole fits (rounds of box fits and bins left out) with and without the compiled call
    rng = np.random.default_rng(21)
    from plexwash.qc.quality.settings import QualitySettings

    settings = QualitySettings()
    k, bins = 6, 400
    design = np.vstack([np.full(bins, 64.0)] + [
        rng.poisson(rng.uniform(1, 200), bins).astype(np.float64) for _ in range(k - 1)])
    target = rng.poisson(design[0] * 0.2 + 0.03 * design[2]).astype(np.float64)
    target[:20] += 400.0  # a stain the model cannot explain
    upper = np.r_[np.inf, np.full(k - 1, 0.1)]
    ours = excess.fit_model(target, design, upper, settings)
    monkeypatch.setattr(excess, "_ROUTINES", None)
    ref = excess.fit_model(target, design, upper, settings)
    for a, b in zip(ours, ref, strict=True):
        assert _bits(a) == _bits(b)


def test_check_at_first_fit():
    # the once-per-process check passes with this numpy and scipy, and fails against a
    # reference that differs in the last bit (then the numpy form runs)
    assert _box_kernels.agrees(excess._ROUTINES, excess._box_least_squares_numpy)

    def off_by_one_ulp(*args):
        return np.nextafter(excess._box_least_squares_numpy(*args), np.inf)

    assert not _box_kernels.agrees(excess._ROUTINES, off_by_one_ulp)
    assert excess._compiled_routines() is excess._ROUTINES


def test_one_row_fit_bit_for_bit(monkeypatch):
    # the flat-background fit of one channel (a one-row design): compiled rounds against
    # excess._fit_one_row_numpy, on channels with and without a stain (bins leave and join)
    from plexwash.qc.quality.settings import QualitySettings

    settings = QualitySettings()
    rng = np.random.default_rng(17)
    handed_back = []
    numpy_form = excess._fit_one_row_numpy
    monkeypatch.setattr(excess, "_fit_one_row_numpy",
                        lambda *a, **k: handed_back.append(1) or numpy_form(*a, **k))
    moved = 0
    for t in range(150):
        shape = (int(rng.integers(3, 50)), int(rng.integers(3, 50)))
        area = np.full(shape, 16.0)
        area[-1] = 8.0
        bins = rng.poisson(rng.uniform(0.01, 3) * area).astype(np.float64)
        if t % 3 == 0:
            bins[:shape[0] // 3] += rng.poisson(40, (shape[0] // 3, shape[1]))
        design = area.ravel()[None, :]
        ours = excess.fit_model(bins.ravel(), design, np.array([np.inf]), settings)
        ref = numpy_form(bins.ravel(), design, np.inf, settings)
        for a, b in zip(ours, ref, strict=True):
            assert _bits(a) == _bits(b), t
        moved += int(not ref[2].all())
    assert not handed_back
    assert moved > 30  # many fits leave bins out (the rounds' sums are exercised)


def test_one_row_check(monkeypatch):
    # passes with this numpy; fails against a reference one ulp off (the numpy form then runs)
    assert excess._one_row_agrees(excess._ROUTINES)
    numpy_form = excess._fit_one_row_numpy

    def off(*args, **kwargs):
        mu, coef, kept = numpy_form(*args, **kwargs)
        return mu, np.nextafter(coef, np.inf), kept

    monkeypatch.setattr(excess, "_fit_one_row_numpy", off)
    assert not excess._one_row_agrees(excess._ROUTINES)
