"""The compiled quality kernels give their references' results to the last bit (issue 13).

Each kernel is checked against a plain numpy / scipy expression of the same rule on
random images, edge shapes included; the quality verdicts depend on them.
"""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.quality._kernels import (
    split_mean_std,
    suppress_spikes,
    uniform_histogram,
)
from plexwash.qc.quality.excess import poisson_tail_below
from scipy import special

SHAPES = [(1, 1), (1, 7), (7, 1), (2, 2), (3, 3), (5, 40), (40, 5), (64, 63)]


def _spikes_reference(image: np.ndarray, ratio: float, excess: float):
    """The spike rule written out per pixel (second largest of the 8 neighbours, floored at 0)."""
    height, width = image.shape
    out = image.astype(np.float64)
    count = 0
    for y in range(height):
        for x in range(width):
            neighbours = sorted((float(image[yy, xx]) for yy in range(max(0, y - 1), min(height, y + 2))
                                 for xx in range(max(0, x - 1), min(width, x + 2)) if (yy, xx) != (y, x)),
                                reverse=True)
            level = max(neighbours[1] if len(neighbours) > 1 else -np.inf, 0.0)
            v = float(image[y, x])
            if v > level * ratio and v - level >= excess and v > 0:
                out[y, x] = level
                count += 1
    return out, count


@pytest.mark.parametrize("shape", SHAPES)
@pytest.mark.parametrize("ratio, excess", [(5.0, 10.0), (1.0, 0.0), (2.0, 3.0)])
def test_spikes_match_the_rule_written_out(shape, ratio, excess):
    rng = np.random.default_rng(sum(shape))
    image = rng.poisson(4.0, shape).astype(np.float32)
    image.flat[rng.integers(0, image.size, max(1, image.size // 20))] += 300  # spikes
    if image.size >= 4:
        image.flat[:2] = 500  # two touching spikes at an edge
    expected, n_expected = _spikes_reference(image, ratio, excess)
    out = np.empty(shape, np.float64)
    assert suppress_spikes(image, ratio, excess, out) == n_expected
    np.testing.assert_array_equal(out, expected)


@pytest.mark.parametrize("shape", SHAPES)
def test_split_mean_std_matches_numpy(shape):
    rng = np.random.default_rng(3)
    values = rng.gamma(2.0, 5.0, shape).astype(np.float32)
    mask = rng.random(shape) < 0.3
    got = split_mean_std(values, mask)
    for side, (mean, std) in ((mask, got[:2]), (~mask, got[2:])):
        if not side.any():
            assert np.isnan(mean) and np.isnan(std)
            continue
        chosen = values[side].astype(np.float64)  # reference: numpy mean / std (ddof 0)
        assert mean == pytest.approx(chosen.mean(), rel=1e-12)
        assert std == pytest.approx(chosen.std(), rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_uniform_histogram_equals_numpy_histogram(dtype):
    rng = np.random.default_rng(4)
    values = np.log1p(rng.gamma(0.7, 30.0, (300, 301))).astype(dtype)
    low, high = float(values.min()), float(values.max())
    edges = np.linspace(low, high, 257, endpoint=True, dtype=np.result_type(low, high, values))
    values.flat[:256] = edges[:-1]  # values exactly on every edge
    counts = np.zeros(256, np.int64)
    uniform_histogram(values, edges, counts)
    expected, expected_edges = np.histogram(values, bins=256, range=(low, high))  # reference: numpy
    np.testing.assert_array_equal(edges, expected_edges)
    np.testing.assert_array_equal(counts, expected)


@pytest.mark.parametrize("alpha", [1e-6, 1e-3, 0.05])
def test_poisson_tail_screen_agrees_with_gammainc(alpha):
    """Bright bins decided without logarithms, the others by the bounds or gammainc: the
    answer is ``scipy.special.gammainc(n, mu) < alpha`` everywhere (reference: scipy)."""
    rng = np.random.default_rng(6)
    mu = np.concatenate([rng.uniform(1e-3, 1.0, 4000), rng.uniform(1.0, 200.0, 4000),
                         rng.uniform(200.0, 1e5, 2000)])
    ratio = np.concatenate([rng.uniform(0.5, 3.0, 5000), rng.uniform(7.5, 8.5, 3000),
                            rng.uniform(8.0, 100.0, 2000)])
    rng.shuffle(ratio)
    n = np.round(mu * ratio)
    np.testing.assert_array_equal(poisson_tail_below(n, mu, alpha), special.gammainc(n, mu) < alpha)


def _speckle_kernel_args(seed: int):
    """A channel with fibres, cells and background over zones where the line test can and
    cannot keep a pixel (levels below and above ``line_max_level``), and its kernel tables."""
    from plexwash.qc.background_context import zone_factors
    from plexwash.qc.steps import speckle as sp
    from plexwash.qc.steps.speckle_settings import SpeckleSettings

    rng = np.random.default_rng(seed)
    levels = np.where(np.arange(256) % 3 == 0, 0.05, np.where(np.arange(256) % 3 == 1, 0.4, 3.0)) * zone_factors()
    zone = rng.choice(np.array([30, 31, 32, 160, 161, 224], np.uint8), (8, 8))
    zone = np.ascontiguousarray(np.repeat(np.repeat(zone, 6, 0), 6, 1)[:45, :47])
    image = rng.poisson(levels[zone]).astype(np.float32)
    image[10, 3:40] += rng.poisson(2.0, 37)  # a dim fibre
    image[20:26, 30:36] += 12.0  # a cell
    settings = SpeckleSettings()
    background = sp._background_from_histogram(None, settings, rate=0.2)._replace(zone_levels=levels)
    params = sp.filter_parameters(settings, background, zone)
    return image, zone, params, settings


@pytest.mark.parametrize("seed", range(3))
def test_speckle_filter_with_the_line_gate_equals_the_filter_asking_every_pixel(seed, monkeypatch):
    """The kernel asks the line test only in zones whose table some line can reach
    (``_line_possible``): the same washed channel as its plain Python form asking the line
    test of every pixel (the kernel before the gate), zones of both kinds present."""
    from plexwash.qc.steps import _kernels as k
    from plexwash.qc.steps import speckle as sp
    from plexwash.qc.steps.speckle_tests import line_offsets

    image, zone, params, settings = _speckle_kernel_args(seed)
    possible = k._line_possible(line_offsets(settings.line_half), params["wide_upper"], params["line_min_count"])
    assert possible[np.unique(zone)].any() and not possible[np.unique(zone)].all()
    counts = sp._counts(image, settings)
    fast = (np.empty_like(image), np.empty_like(image))
    sp._speckle_apply(image, counts, zone, params, *fast)
    monkeypatch.setattr(k, "_line_possible", lambda offsets, upper, tables: np.full(tables.shape[0], len(offsets) > 0))
    monkeypatch.setattr(k, "speckle_filter", k.speckle_filter.py_func)
    plain = (np.empty_like(image), np.empty_like(image))
    sp._speckle_apply(image, counts, zone, params, *plain)
    np.testing.assert_array_equal(fast[0], plain[0])
    np.testing.assert_array_equal(fast[1], plain[1])
    assert (fast[1] > 0).any() and (fast[0] > 0).any()


def test_line_possible_equals_the_table_comparison():
    """``_line_possible`` against numpy: some line length ``t`` whose table entry ``t`` pixels of
    the brightest dim value reach."""
    from plexwash.qc.steps import _kernels as k
    from plexwash.qc.steps.speckle_tests import line_offsets

    rng = np.random.default_rng(2)
    offsets = line_offsets(4)
    tables = rng.integers(0, 60, (50, 2, offsets.shape[1] + 1)).astype(np.int32)
    tables[::4] = np.iinfo(np.int32).max
    for upper in (0.4, 3.0, 7.49, 7.5):
        expected = (tables[:, 0, :] <= np.arange(offsets.shape[1] + 1) * np.floor(upper + 0.5)).any(axis=1)
        np.testing.assert_array_equal(k._line_possible(offsets, upper, tables), expected)
    assert not k._line_possible(offsets[:0], 3.0, tables).any()


@pytest.mark.parametrize("shape", [(1, 1), (1, 9), (9, 1), (2, 2), (31, 40)])
def test_dropping_isolated_pixels_equals_the_component_rule_at_two_pixels(shape):
    """The kernel's shortcut for ``min_area`` 2 against the general union-find labelling
    (``_drop_small_components``), on random states with every kind of pixel."""
    from plexwash.qc.steps import _kernels as k

    rng = np.random.default_rng(shape[0] * 100 + shape[1])
    for density in (0.05, 0.3, 0.7):
        state = rng.choice(np.array([0, 1, 2, 3, 4], np.uint8), shape,
                           p=[1 - density, density / 4, density / 4, density / 4, density / 4])
        fast, general = state.copy(), state.copy()
        k._drop_isolated(fast)
        k._drop_small_components(general, 2)
        np.testing.assert_array_equal(fast, general)
