"""The ghost fits' bounded least squares is scipy's, bit for bit, without scipy's overhead.

Reference: ``scipy.optimize.lsq_linear(method="bvls")`` (the Stark & Parker BVLS algorithm)
and, for the Cholesky/triangular steps of the box fit, ``scipy.linalg.cholesky`` /
``scipy.linalg.solve_triangular``: the box fit below is the form the ghost fits used before,
written with those library calls, and the new one must return the same bits.
"""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.quality import excess
from plexwash.qc.quality._bvls import bounded_lstsq
from scipy import linalg, optimize


def _scipy_bvls(a, b, lb, ub):
    # reference library: scipy.optimize.lsq_linear, method="bvls", default tolerances
    return optimize.lsq_linear(a, b, bounds=(lb, ub), method="bvls").x


def _scipy_box(gram, cross, lower, upper):
    """The box fit written with scipy.linalg and scipy.optimize.lsq_linear (the reference)."""
    coef = lower.astype(np.float64).copy()
    free = (upper > lower) & (np.diag(gram) > 0)
    if not free.any():
        return coef
    idx = np.flatnonzero(free)
    fixed = np.flatnonzero(~free)
    h = cross[idx] - gram[np.ix_(idx, fixed)] @ coef[fixed]
    scale = np.sqrt(np.diag(gram)[idx])
    g = gram[np.ix_(idx, idx)] / np.outer(scale, scale)
    g[np.diag_indices_from(g)] += 1e-9
    h = h / scale
    lo, hi = lower[idx] * scale, upper[idx] * scale
    if len(idx) == 1:
        coef[idx] = np.clip(h / g[0, 0], lo, hi) / scale
        return coef
    try:
        chol = linalg.cholesky(g, lower=True)
        design, rhs = chol.T, linalg.solve_triangular(chol, h, lower=True)
    except linalg.LinAlgError:
        w, v = linalg.eigh((g + g.T) / 2)
        root = np.sqrt(np.maximum(w, 1e-9))
        design, rhs = (v * root).T, (v.T @ h) / root
    coef[idx] = _scipy_bvls(design, rhs, lo, hi) / scale
    return coef


def _bits(x):
    return np.asarray(x, np.float64).tobytes()


def _systems():
    """Random and degenerate bounded systems: (a, b, lb, ub)."""
    rng = np.random.default_rng(11)
    out = []
    for _ in range(300):
        m, n = int(rng.integers(2, 40)), int(rng.integers(1, 9))
        a = rng.normal(size=(m, n))
        b = rng.normal(size=m) * rng.choice([0.1, 1.0, 100.0])
        lb = np.where(rng.random(n) < 0.7, 0.0, -rng.random(n))
        ub = np.where(rng.random(n) < 0.5, np.inf, lb + rng.random(n) * 0.5 + 1e-3)
        out.append((a, b, lb, ub))
    # degenerate: repeated columns, a zero column, more unknowns than equations, b = 0,
    # every bound active, bounds tight around the answer
    a = rng.normal(size=(10, 4))
    a[:, 3] = a[:, 1]
    out.append((a, rng.normal(size=10), np.zeros(4), np.full(4, 0.2)))
    a = rng.normal(size=(10, 3))
    a[:, 0] = 0.0
    out.append((a, rng.normal(size=10), np.zeros(3), np.full(3, np.inf)))
    out.append((rng.normal(size=(3, 6)), rng.normal(size=3), np.zeros(6), np.ones(6)))
    out.append((rng.normal(size=(8, 3)), np.zeros(8), np.zeros(3), np.ones(3)))
    a = np.abs(rng.normal(size=(12, 3)))
    out.append((a, -a @ np.ones(3), np.zeros(3), np.full(3, np.inf)))
    out.append((a, a @ np.array([5.0, 6.0, 7.0]), np.zeros(3), np.ones(3)))
    return out


def test_bounded_lstsq_is_scipys_bvls_bit_for_bit():
    clipped = 0
    for a, b, lb, ub in _systems():
        ours = bounded_lstsq(a, b, lb, ub)
        reference = _scipy_bvls(a, b, lb, ub)  # reference: scipy.optimize.lsq_linear (BVLS)
        assert _bits(ours) == _bits(reference)
        clipped += bool(np.any(ours == lb) or np.any(ours == ub))
    assert clipped > 50  # the BVLS iterations were exercised, not only the unconstrained answer


def _gram_systems():
    rng = np.random.default_rng(5)
    out = []
    for _ in range(200):
        rows, bins = int(rng.integers(1, 10)), int(rng.integers(4, 80))
        design = rng.random((rows, bins)) * rng.choice([1.0, 30.0])
        if rows > 2 and rng.random() < 0.3:
            design[2] = design[1]  # dependent sources
        if rows > 1 and rng.random() < 0.2:
            design[-1] = 0.0  # a source with no counts
        target = design.T @ rng.normal(0.3, 0.5, rows) + rng.normal(0, 0.2, bins)
        gram, cross = design @ design.T, design @ target
        upper = np.where(rng.random(rows) < 0.3, 0.0, np.where(rng.random(rows) < 0.5, np.inf, 0.5))
        out.append((gram, cross, np.zeros(rows), upper))
    # rounding pushed G just below positive definite (the eigen-decomposition path)
    design = rng.random((3, 200))
    design[2] = design[1]
    gram = design @ design.T
    gram[1, 1] -= 1e-6 * gram[1, 1]
    out.append((gram, design @ rng.random(200), np.zeros(3), np.full(3, 0.5)))
    return out


def test_box_fit_equals_the_scipy_form_bit_for_bit():
    for gram, cross, lower, upper in _gram_systems():
        ours = excess._box_least_squares(gram, cross, lower, upper)
        reference = _scipy_box(gram, cross, lower, upper)  # scipy.linalg + lsq_linear
        assert _bits(ours) == _bits(reference)


@pytest.mark.parametrize("moved", [(True, True), (True, False), (False, True), (False, False)])
def test_moved_bins_equal_the_full_update(moved):
    # the Gram update skips the product of a side no bin moved to; the sums stay the same bits
    rng = np.random.default_rng(2)
    design = rng.random((3, 50)).astype(np.float32)
    target = rng.random(50)
    left = np.zeros(50, bool)
    joined = np.zeros(50, bool)
    left[[3, 7]] = moved[0]
    joined[[10, 20, 30]] = moved[1]
    g, h = excess.gram_matrix(design), design.astype(np.float64) @ target
    g_out, h_out = excess._partial_gram(design, target, np.flatnonzero(left))
    g_in, h_in = excess._partial_gram(design, target, np.flatnonzero(joined))
    new_g, new_h = excess._moved_bins(g, h, design, target, left, joined)
    assert _bits(new_g) == _bits(g - g_out + g_in) and _bits(new_h) == _bits(h - h_out + h_in)


def test_one_unknown_equals_the_scipy_form_bit_for_bit():
    # the scalar path of a fit with one unknown (a flat background): signed zeros, bounds
    # hit from both sides, huge and tiny values
    rng = np.random.default_rng(8)
    cases = [(4.0, -0.0, 0.0, np.inf), (4.0, 0.0, 0.0, np.inf), (2.0, -3.0, 0.0, np.inf),
             (2.0, 30.0, 0.0, 0.5), (1e-300, 1e-300, 0.0, np.inf), (1e300, 1e300, 0.0, 2.0)]
    cases += [(float(rng.random() * 10.0 ** rng.integers(-5, 6)), float(rng.normal() * 10.0 ** rng.integers(-5, 6)),
               0.0, float(rng.choice([np.inf, 0.5, 2.0]))) for _ in range(300)]
    for gram, cross, lower, upper in cases:
        args = (np.array([[gram]]), np.array([cross]), np.array([lower]), np.array([upper]))
        ours = excess._box_least_squares(*args)
        assert _bits(ours) == _bits(_scipy_box(*args))  # scipy.linalg / lsq_linear form


@pytest.mark.parametrize("bins", [50, 8192, 20_000])
def test_fits_with_the_float64_design_kept_give_the_same_bits(bins):
    # WideDesign keeps the float64 copies the rounds convert each time: the products, the
    # Gram updates and so every fit must come out as the same bits (the plain conversion
    # as it goes is the reference)
    from plexwash.qc.quality.settings import QualitySettings

    rng = np.random.default_rng(bins)
    sources = rng.poisson(rng.gamma(1.0, 20.0, (5, 1)), (5, bins)).astype(np.float32)
    areas = np.full((1, bins), 16.0, np.float32)
    design = np.vstack([areas, sources])
    wide = excess.WideDesign(design)
    coef = rng.random(design.shape[0])
    assert _bits(excess.combine_rows(coef, design, wide)) == _bits(excess.combine_rows(coef, design))
    index = np.flatnonzero(rng.random(bins) < 0.3)
    target = rng.random(bins) * 50
    for a, b in zip(excess._partial_gram(wide.whole, target, index),
                    excess._partial_gram(design, target, index), strict=True):
        assert _bits(a) == _bits(b)
    # a channel made of background, a ghost of source 1 and a stain in some bins
    own = rng.poisson(2.0 + 0.05 * sources[1] + 40.0 * (rng.random(bins) < 0.05)).astype(np.float32)
    design = np.vstack([design, own])
    wide = excess.WideDesign(design)
    gram = excess.gram_matrix(design)
    upper = np.r_[np.inf, np.full(5, 0.1), 0.0]
    settings = QualitySettings()
    plain = excess.fit_model(design[-1].astype(np.float64), design, upper, settings,
                             gram=gram, cross=gram[:, -1])
    kept = excess.fit_model(wide.whole[-1], design, upper, settings, gram=gram,
                            cross=gram[:, -1], wide=wide)
    for a, b in zip(plain, kept, strict=True):
        assert _bits(a) == _bits(b)
    assert excess.WideDesign.of(np.zeros((40, excess.WIDE_DESIGN_BYTES // 16 // 40 + 1),
                                          np.float32)) is None


def test_lstsq_is_numpys_bit_for_bit():
    """The direct call of numpy's lstsq gufunc returns numpy.linalg.lstsq's solution
    (reference: numpy.linalg.lstsq), on full-rank, rank-deficient and tall systems."""
    from plexwash.qc.quality._bvls import lstsq

    rng = np.random.default_rng(21)
    for trial in range(600):
        m, n = int(rng.integers(1, 9)), int(rng.integers(1, 9))
        a = rng.standard_normal((m, n)) * 10.0 ** rng.integers(-3, 4)
        if trial % 3 == 0 and n > 1:
            a[:, 0] = a[:, -1]  # rank-deficient
        b = rng.standard_normal(m)
        for rcond in (-1, None):
            expected = np.linalg.lstsq(a, b, rcond=rcond)[0]
            got = lstsq(a, b, rcond)
            assert got.shape == expected.shape and _bits(got) == _bits(expected)
    # a column slice (not contiguous) and NaN go through numpy itself: the same answer
    a = rng.standard_normal((6, 6))[:, ::2]
    b = rng.standard_normal(6)
    assert _bits(lstsq(a, b, None)) == _bits(np.linalg.lstsq(a, b, rcond=None)[0])


@pytest.mark.parametrize("block", [None, 7])
def test_one_row_fit_is_the_general_fit_bit_for_bit(monkeypatch, block):
    """The flat background fit of one channel (a one-row design) by compiled loops gives the
    plain rounds' mu, coefficient and kept bins to the bit (reference: ``_plain_fit``, the
    rounds as numpy and scipy computed them before)."""
    from plexwash.qc.quality.settings import QualitySettings

    if block is not None:  # several Gram blocks
        monkeypatch.setattr(excess, "_GRAM_BLOCK", block)
    rng = np.random.default_rng(22)
    settings = QualitySettings()
    for trial in range(60):
        shape = (int(rng.integers(2, 30)), int(rng.integers(2, 30)))
        areas = np.full(shape, 16.0)
        areas[-1] = float(rng.integers(1, 16))  # partial last bins
        rate = rng.gamma(1.0, 0.5)
        counts = rng.poisson(rate * areas).astype(np.float64)
        if trial % 2:  # a stain over part of the bins, so that rounds leave bins out
            counts += rng.poisson(30.0, shape) * (rng.random(shape) < rng.random())
        if trial % 7 == 0:
            counts[:] = 0.0
        design = areas.ravel()[None, :]
        upper = np.array([np.inf if trial % 5 else 0.5 * rate])
        fast = excess._fit_one_row(counts.ravel(), design, float(upper[0]), settings)
        plain = _plain_fit(counts.ravel(), design, upper, settings)
        for a, b in zip(fast, plain, strict=True):
            assert a.dtype == b.dtype and _bits(a) == _bits(b)
        routed = excess.fit_model(counts.ravel(), design, upper, settings)
        assert all(_bits(a) == _bits(b) for a, b in zip(routed, plain, strict=True))


def _plain_fit(target, design, upper, settings, *, gram=None, cross=None, n_background=1,
               wide=None):
    """The fit's rounds as they were written with numpy before (the reference): the bins'
    verdicts by ``poisson_tail_below``, the moved bins by boolean masks."""
    unit = settings.counts_per_unit
    if gram is None:
        gram = excess.gram_matrix(design)
        cross = excess._cross(design, target)
    n = target * unit
    if wide is None:
        floor = design[:n_background].astype(np.float64).sum(axis=0)
    else:
        floor = wide.whole[:n_background].sum(axis=0)
    floor = settings.background_floor * unit * floor
    kept = np.ones(n.shape, bool)
    lower = np.zeros(design.shape[0])
    g, h = gram, cross
    for _ in range(excess._MAX_FIT_ROUNDS):
        coef = excess._box_least_squares(g, h, lower, upper)
        mu = np.maximum(unit * excess.combine_rows(coef, design, wide), floor)
        new_kept = ~excess.poisson_tail_below(n, mu, settings.fit_alpha)
        if not new_kept.any() or np.array_equal(new_kept, kept):
            break
        g, h = excess._moved_bins(g, h, design if wide is None else wide.whole, target,
                                  kept & ~new_kept, new_kept & ~kept)
        kept = new_kept
    return mu, coef, kept


@pytest.mark.parametrize("known", [False, True])
def test_fit_rounds_are_the_plain_rounds_bit_for_bit(known):
    """Region backgrounds and ghosts (a known pattern with one scale, or every source with
    its own bound) fitted by ``fit_model`` give the plain rounds' results to the bit."""
    from plexwash.qc.quality.settings import QualitySettings

    rng = np.random.default_rng(23 + known)
    settings = QualitySettings()
    for trial in range(40):
        bins = int(rng.integers(9, 400))
        glass = rng.random(bins) < 0.3
        areas = np.vstack([16.0 * glass, 16.0 * ~glass]).astype(np.float32)
        k = 2 if trial % 2 else 1
        if k == 1:
            areas = areas.sum(axis=0, keepdims=True)
        sources = rng.poisson(rng.gamma(1.0, 20.0, (6, 1)), (6, bins)).astype(np.float32)
        rate = 0.05 + 0.3 * ~glass
        own = rng.poisson(16 * rate + 0.05 * sources[2]
                          + 40.0 * (rng.random(bins) < rng.random() * 0.2)).astype(np.float32)
        design = np.vstack([areas, sources, own])
        target = design[-1].astype(np.float64)
        if known:
            weights = rng.random(design.shape[0] - k) * 0.05
            weights[-1] = 0.0
            ghost = excess.combine_rows(weights, design[k:])
            rows = np.vstack([design[:k].astype(np.float64), ghost])
            upper = np.r_[np.full(k, np.inf), 2.0]
            args = dict(n_background=k)
            fast = excess.fit_model(target, rows, upper, settings, **args)
            plain = _plain_fit(target, rows, upper, settings, **args)
        else:
            gram = excess.gram_matrix(design)
            upper = np.r_[np.full(k, np.inf), np.where(rng.random(6) < 0.5, 0.1, 0.0), 0.0]
            wide = excess.WideDesign(design) if trial % 3 else None
            args = dict(gram=gram, cross=gram[:, -1], n_background=k, wide=wide)
            fast = excess.fit_model(target, design, upper, settings, **args)
            plain = _plain_fit(target, design, upper, settings, **args)
        for a, b in zip(fast, plain, strict=True):
            assert a.dtype == b.dtype and _bits(a) == _bits(b)
