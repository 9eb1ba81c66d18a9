"""Compensation: exact per-pixel NNLS against scipy, KKT conditions, dask, the linear method."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.spillover import (
    SpilloverMatrix,
    _nnls,
    compensate,
    compensate_array,
    plausible_pairs,
)
from plexwash.qc.spillover.solver import _prepare_components
from scipy.optimize import nnls

MASS_CHANNELS = ["Y89", "Pr141", "Nd142", "Nd143", "Nd144", "Nd145", "Nd146", "Sm147", "Nd148",
                 "Sm149", "Nd150", "Eu151", "Sm152", "Eu153", "Gd156", "Gd157", "Gd158", "Tb159",
                 "Gd160", "Dy161", "Dy162", "Dy163", "Dy164", "Ir191"]


def physics_matrix(channels, rng, *, scale=1.0):
    """A spillover matrix on the plausible pairs: M+-1 ~0.5 %, isotopes ~2 %, oxides ~2 %."""
    pairs = plausible_pairs(channels)
    s = np.eye(len(channels))
    s[pairs] = rng.uniform(0.002, 0.03, int(pairs.sum())) * scale
    return s


def count_stack(s, shape, rng):
    """Poisson counts of sparse bright 'cells' on a ~1 count/pixel background, spilled by s."""
    n = s.shape[0]
    x = rng.gamma(0.5, 1.0, size=(n, 1, 1)) * np.ones((n,) + shape)
    cells = rng.random((n,) + shape) < 0.15
    x = x + cells * rng.lognormal(3.5, 1.0, size=(n,) + shape)
    return rng.poisson(np.einsum("ij,iyx->jyx", s, x)).astype(np.float32)


def assert_matches_scipy(stack, s, out, *, every=1):
    """Per pixel: objective never worse than scipy.optimize.nnls (reference), within 1e-6."""
    a = s.T
    flat_y = stack.reshape(stack.shape[0], -1).astype(np.float64)
    flat_x = out.reshape(out.shape[0], -1).astype(np.float64)
    assert flat_x.min() >= 0.0
    worst = 0.0
    for p in range(0, flat_y.shape[1], every):
        y = flat_y[:, p]
        _, residual = nnls(a, y)  # reference: scipy.optimize.nnls (Lawson-Hanson)
        ref = residual**2
        ours = float(np.sum((a @ flat_x[:, p] - y) ** 2))
        # float32 output rounds x by 6e-8 relative; at the optimum that changes the
        # objective only at second order, i.e. ~1e-15 of ||y||^2.
        allowed = ref * (1.0 + 1e-6) + 1e-12 * float(y @ y) + 1e-300
        worst = max(worst, (ours - ref) / max(ref, 1e-12 * float(y @ y), 1e-300))
        assert ours <= allowed, (p, ours, ref)
    return worst


def kkt_violation(stack, s, out):
    """Largest violation of the KKT conditions of NNLS, relative to each pixel's max count.

    Lawson & Hanson (1974), ch. 23, Theorem 23.4: x >= 0, gradient g = A^T (A x - y) with
    g_i = 0 where x_i > 0 and g_i >= 0 where x_i = 0.
    """
    a = s.T
    y = stack.reshape(stack.shape[0], -1).astype(np.float64)
    x = out.reshape(out.shape[0], -1).astype(np.float64)
    g = a.T @ (a @ x - y)
    scale = np.maximum(np.abs(y).max(axis=0), 1.0)
    free = np.where(x > 0, np.abs(g), 0.0)
    bound = np.where(x == 0, np.maximum(-g, 0.0), 0.0)
    return max(float((free / scale).max()), float((bound / scale).max()), float(max(-x.min(), 0.0)))


@pytest.fixture(scope="module")
def physics():
    rng = np.random.default_rng(11)
    s = physics_matrix(MASS_CHANNELS, rng)
    stack = count_stack(s, (40, 36), rng)
    return s, stack


def test_count_data_matches_scipy_nnls(physics):
    s, stack = physics
    out = compensate(stack, s)
    assert out.dtype == np.float32 and out.shape == stack.shape
    assert_matches_scipy(stack, s, out)
    # the case the solver exists for: the clipped unconstrained solve is not the answer
    clipped = np.clip(np.linalg.solve(s.T, stack.reshape(len(s), -1)), 0, None)
    assert np.abs(clipped - out.reshape(len(s), -1)).max() > 1e-3


def test_random_matrices_and_real_valued_data_match_scipy_nnls():
    rng = np.random.default_rng(5)
    for n in (2, 5, 9, 16):
        s = np.eye(n)
        mask = rng.random((n, n)) < 0.4
        np.fill_diagonal(mask, False)
        s[mask] = rng.uniform(0.0, 0.12, int(mask.sum()))
        stack = rng.normal(3.0, 4.0, size=(n, 12, 11)).astype(np.float32)  # negatives too
        assert_matches_scipy(stack, s, compensate(stack, s))


def test_strong_spillover_uses_pivoting_and_matches_scipy():
    rng = np.random.default_rng(8)
    n = 7
    s = np.eye(n) + np.triu(rng.uniform(0.3, 0.6, (n, n)), 1) * (rng.random((n, n)) < 0.7)
    (comp,) = [c for c in _prepare_components(s) if c.idx.size > 1]
    assert comp.mode == _nnls.MODE_PIVOT  # not a max-norm contraction: sweeps not used
    stack = count_stack(s, (20, 19), rng)
    out = compensate(stack, s)
    counts = {}
    again = compensate_array(stack, s, method="nnls", parallel=True, counts=counts)
    np.testing.assert_array_equal(again, out)
    assert counts["pivoted"] > 0 and counts["last_resort"] == 0  # the pivoting path ran
    assert_matches_scipy(stack, s, out)
    assert kkt_violation(stack, s, out) < 1e-5


def test_strong_spillover_in_components_of_two_and_three_channels():
    # The pivoting solver once read a block's scratch rows (at least four) as the
    # component's channels: components of fewer than four channels read past their
    # matrices (garbage or a crash). Reference: scipy.optimize.nnls per pixel.
    s = np.eye(6)
    s[0, 1], s[1, 0] = 0.9, 0.8  # two channels, strong both ways
    s[2, 3], s[3, 4], s[4, 2] = 0.7, 0.6, 0.75  # three channels in a strong ring
    comps = [c for c in _prepare_components(s) if c.idx.size > 1]
    assert sorted(c.idx.size for c in comps) == [2, 3]
    assert {c.mode for c in comps} == {_nnls.MODE_PIVOT}
    rng = np.random.default_rng(21)
    stack = rng.poisson(5.0, size=(6, 17, 13)).astype(np.float32)
    for parallel in (True, False):
        counts = {}
        out = compensate_array(stack, s, method="nnls", parallel=parallel, counts=counts)
        assert counts["pivoted"] > 0
        assert_matches_scipy(stack, s, out)
        assert kkt_violation(stack, s, out) < 1e-5
    # the same pixels through the sweeps' hand-over to pivoting (a weak two-channel pair)
    weak = np.eye(3)
    weak[0, 1] = 0.05
    out = compensate_array(stack[:3], weak, method="nnls", parallel=False, max_sweeps=1)
    assert_matches_scipy(stack[:3], weak, out)


def test_sweeps_handing_pixels_to_pivoting_stay_exact(physics):
    s, stack = physics
    assert {c.mode for c in _prepare_components(s) if c.idx.size > 1} == {_nnls.MODE_SWEEP}
    normal = {}
    compensate_array(stack, s, method="nnls", parallel=True, counts=normal)
    # One sweep cannot converge: every unfinished pixel goes to the pivoting solver.
    counts = {}
    out = compensate_array(stack, s, method="nnls", parallel=True, max_sweeps=1, counts=counts)
    assert counts["pivoted"] > 10 * max(normal["pivoted"], 1)  # the hand-over really ran
    assert_matches_scipy(stack, s, out)
    np.testing.assert_allclose(out, compensate(stack, s), rtol=1e-5, atol=1e-4)


def test_lawson_hanson_last_resort_is_exact(physics):
    s, stack = physics
    # no sweeps to speak of and no pivoting exchanges: pixels whose first partition guess
    # is wrong are solved by Lawson-Hanson from scratch
    counts = {}
    out = compensate_array(stack, s, method="nnls", parallel=False, max_sweeps=1,
                           max_exchanges=0, counts=counts)
    assert counts["last_resort"] > 0  # the Lawson-Hanson fallback really ran
    assert_matches_scipy(stack, s, out, every=3)


def test_kkt_conditions_on_a_full_panel(physics):
    s, stack = physics
    out = compensate(stack, s)
    # float32 output: the gradient is exact to ~1e-7 of the pixel's counts
    assert kkt_violation(stack, s, out) < 2e-6


def test_float64_input_is_solved_in_float64(physics):
    s, stack = physics
    data = stack.astype(np.float64) + 0.25
    assert_matches_scipy(data, s, compensate(data, s), every=7)


def test_channels_in_no_spillover_are_clipped_only():
    rng = np.random.default_rng(2)
    stack = rng.normal(1.0, 2.0, size=(3, 8, 9)).astype(np.float32)
    s = np.eye(3)
    s[0, 1] = 0.05  # channel 2 takes part in nothing
    out = compensate(stack, s)
    np.testing.assert_array_equal(out[2], np.maximum(stack[2], 0))
    assert_matches_scipy(stack, s, out)


def test_linear_method_is_solve_then_clip(physics):
    s, stack = physics
    out = compensate(stack, s, method="linear")
    # reference: numpy.linalg.solve of S^T x = y, then clipped at 0
    ref = np.clip(np.linalg.solve(s.T, stack.reshape(len(s), -1).astype(np.float64)), 0, None)
    np.testing.assert_allclose(out.reshape(len(s), -1), ref, rtol=1e-6, atol=1e-4)


def test_dask_matches_numpy_across_chunk_borders(physics):
    da = pytest.importorskip("dask.array")
    s, stack = physics
    lazy = da.from_array(stack, chunks=(5, 17, 13))  # splits channels, rows and columns
    out = compensate(lazy, s)
    assert isinstance(out, da.Array) and out.dtype == np.float32
    assert out.chunks[1:] == lazy.chunks[1:] and len(out.chunks[0]) == 1
    result = out.compute(scheduler="threads")
    # every pixel is solved on its own: chunking changes no bit of the result
    np.testing.assert_array_equal(result, compensate(stack, s))
    assert_matches_scipy(stack, s, result, every=5)
    linear = compensate(lazy, s, method="linear").compute(scheduler="sync")
    np.testing.assert_array_equal(linear, compensate(stack, s, method="linear"))
    assert out.name == compensate(lazy, s).name  # deterministic graph


def test_a_pixel_does_not_depend_on_its_neighbours(physics):
    s, stack = physics
    flat = stack.reshape(len(s), 1, -1)
    order = np.random.default_rng(0).permutation(flat.shape[2])
    shuffled = compensate(np.ascontiguousarray(flat[:, :, order]), s)
    np.testing.assert_array_equal(shuffled[:, :, np.argsort(order)], compensate(flat, s))


def test_inputs_untouched_integer_input_and_matrix_object(physics):
    s, stack = physics
    counts = stack.astype(np.uint16)
    before = counts.copy()
    matrix = SpilloverMatrix(tuple(MASS_CHANNELS), s)
    out = compensate(counts, matrix)
    np.testing.assert_array_equal(counts, before)
    assert out.dtype == np.float32
    np.testing.assert_allclose(out, compensate(stack, s), rtol=1e-6, atol=1e-5)



def test_result_does_not_depend_on_the_thread_count(physics):
    """Deterministic across settings that could change it: numba's thread count (1, 2 and
    the machine's) and the serial kernel that dask's threads call."""
    import numba

    s, stack = physics
    before = numba.get_num_threads()
    results = []
    try:
        for threads in sorted({1, min(2, numba.config.NUMBA_NUM_THREADS),
                               numba.config.NUMBA_NUM_THREADS}):
            numba.set_num_threads(threads)
            results.append(compensate_array(stack, s, method="nnls", parallel=True))
    finally:
        numba.set_num_threads(before)
    results.append(compensate_array(stack, s, method="nnls", parallel=False))
    for other in results[1:]:
        np.testing.assert_array_equal(other, results[0])


def test_bad_matrix_or_method_refused(physics):
    s, stack = physics
    with pytest.raises(InputError, match=r"^spillover: matrix is 3 x 3 but the stack has 24 channels"):
        compensate(stack, np.eye(3))
    bad = s.copy()
    bad[0, 1] = -0.1
    with pytest.raises(InputError, match=r"off-diagonal entries must be in \[0, 1\)"):
        compensate(stack, bad)
    with pytest.raises(InputError, match="not a finite number"):
        compensate(stack, np.where(np.eye(len(s)) > 0, 1.0, np.nan))
    with pytest.raises(InputError, match="unknown compensation method"):
        compensate(stack, s, method="fast")
    with pytest.raises(InputError, match="C x Y x X"):
        compensate(stack[0], s)
