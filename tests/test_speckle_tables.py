"""The speckle tables: the compiled and vectorised searches equal the plain searches entry for entry
(the plain forms are the reference: both compare ``scipy.special.pdtrc``/``bdtrc`` tails)."""

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


def _binomial_min_count_plain(trials, rate, alpha):
    """The search entry by entry (no sharing of equal pairs); ``scipy.special.bdtrc`` is the
    binomial upper tail."""
    from scipy import special

    trials, rate = np.broadcast_arrays(np.asarray(trials, np.int64), np.asarray(rate, np.float64))
    out = np.empty(trials.shape, np.int64)
    for i in np.ndindex(trials.shape):
        low, high = 0, int(trials[i]) + 1
        while high - low > 1:
            mid = (low + high) // 2
            low, high = (low, mid) if special.bdtrc(mid - 1, trials[i], rate[i]) < alpha else (mid, high)
        out[i] = high
    return out


@pytest.mark.parametrize("alpha", [1e-5, 0.003, 0.2])
def test_binomial_min_count_equals_the_plain_search(alpha):
    from plexwash.qc.steps.speckle_tests import binomial_min_count

    rng = np.random.default_rng(3)
    a, b = np.meshgrid(np.arange(12), np.arange(12), indexing="ij")
    trials = np.maximum(a * b - 1, 0)
    rates = np.concatenate([rng.uniform(0, 1, 6), [0.0, 1.0, 0.5, 0.5]])[:, None, None]
    got = binomial_min_count(trials, rates, alpha)
    assert got.shape == (10, 12, 12)
    np.testing.assert_array_equal(got, _binomial_min_count_plain(trials, rates, alpha))
    assert int(binomial_min_count(np.array(8), 0.1, alpha)) == int(_binomial_min_count_plain(8, 0.1, alpha))


@pytest.mark.parametrize("alpha", [1e-12, 1e-6, 0.001, 0.01, 0.2, 0.5])
def test_compiled_binomial_search_equals_the_plain_search_on_many_rates(alpha):
    """The compiled search (scipy's own ``bdtrc`` through ``scipy.special.cython_special``) against
    the plain search with the ``scipy.special.bdtrc`` ufunc, on rates from 0 to 1 (tiny ones too)
    and trial counts 0..200."""
    from plexwash.qc.steps.speckle_tests import binomial_min_count

    rng = np.random.default_rng(int(-np.log10(alpha) * 10))
    rates = np.concatenate([rng.uniform(0, 1, 25), 10.0 ** rng.uniform(-12, 0, 15),
                            1.0 - 10.0 ** rng.uniform(-12, -1, 5), [0.0, 1.0, 0.5]])
    trials = np.concatenate([np.arange(26), rng.integers(26, 201, 10)])
    got = binomial_min_count(trials[:, None], rates[None, :], alpha)
    np.testing.assert_array_equal(got, _binomial_min_count_plain(trials[:, None], rates[None, :], alpha))


def test_poisson_min_values_equal_the_scalar_search_on_wide_levels():
    """Levels over 24 orders of magnitude (``scipy.special.pdtrc`` is the Poisson upper tail)."""
    rng = np.random.default_rng(11)
    levels = np.concatenate([10.0 ** rng.uniform(-12, 5, 400), -rng.uniform(0, 1, 5)])
    for alpha in (1e-12, 1e-3, 0.2):
        expected = np.array([poisson_min_value(v, alpha) for v in levels])
        np.testing.assert_array_equal(poisson_min_values(levels, alpha), expected)


def test_low_mean_table_is_cached_read_only_and_equals_the_inverse_gamma():
    """``scipy.special.gammainccinv`` is the inverse of the regularised upper incomplete gamma."""
    from plexwash.qc.steps.speckle_tests import LOW_VALUES, low_mean_table
    from scipy import special

    first = low_mean_table(1e-3)
    assert low_mean_table(1e-3) is first and not first.flags.writeable
    np.testing.assert_array_equal(first, special.gammainccinv(np.arange(LOW_VALUES + 1.0) + 1.0, 1e-3))
    assert np.isinf(low_mean_table(0.0)).all()


def test_tables_of_the_zones_present_equal_the_tables_of_every_zone():
    """The kernel reads the zone tables only at the codes of the zone map: tabulated on the
    codes present, those entries equal the tables of all 256 codes, and the washed channel is
    the same."""
    from plexwash.qc.background_context import zone_factors
    from plexwash.qc.steps import speckle as sp
    from plexwash.qc.steps.speckle_settings import SpeckleSettings
    from plexwash.qc.steps.speckle_tests import tabulated_levels

    levels = np.where(np.arange(256) < 128, 0.02, 0.3) * zone_factors()
    rng = np.random.default_rng(5)
    zone = rng.choice(np.array([40, 41, 170, 200], np.uint8), (60, 60))
    tabled = tabulated_levels(levels, zone)
    present = np.unique(zone)
    np.testing.assert_array_equal(tabled[present], levels[present])
    assert len(np.unique(tabled)) == len(present)
    assert tabulated_levels(levels, None) is levels
    settings = SpeckleSettings()
    background = sp._background_from_histogram(None, settings, rate=0.2)._replace(zone_levels=levels)
    everywhere = sp.filter_parameters(settings, background)
    here = sp.filter_parameters(settings, background, zone)
    for key, value in everywhere.items():
        if isinstance(value, np.ndarray) and value.shape[:1] == (256,):
            np.testing.assert_array_equal(here[key][present], value[present], err_msg=key)
        elif isinstance(value, np.ndarray):
            np.testing.assert_array_equal(here[key], value, err_msg=key)
        else:
            assert here[key] == value, key
    image = rng.poisson(np.where(zone >= 128, 0.3, 0.02)).astype(np.float32)
    image[20:30, 20:30] += 5.0
    counts = sp._counts(image, settings)
    results = []
    for params in (everywhere, here):
        out, removed = np.empty_like(image), np.empty_like(image)
        sp._speckle_apply(image, counts, zone, params, out, removed)
        results.append(out)
    np.testing.assert_array_equal(results[0], results[1])
    assert (results[0] != image).any()


def _region_histogram_plain(image, counts, threshold, radius, zone):
    """The histogram by ``np.bincount`` of one code per full window (the reference)."""
    from plexwash.qc.background_context import PARTS, ZONES_PER_PART

    size = (2 * radius + 1) ** 2
    inner = (slice(radius, image.shape[0] - radius), slice(radius, image.shape[1] - radius))
    centre = (image[inner] > np.float32(threshold)).astype(np.int64)
    part = (zone[inner] // ZONES_PER_PART).astype(np.int64)
    code = (2 * part + centre) * size + counts[inner].astype(np.int64) - centre
    return np.bincount(code.ravel(), minlength=2 * len(PARTS) * size).reshape(len(PARTS), 2, size)


@pytest.mark.parametrize("radius", [1, 2, 3])
def test_region_histogram_equals_the_bincount(radius):
    from plexwash.qc.steps.speckle_counts import region_histogram, window_counts

    rng = np.random.default_rng(radius)
    image = rng.poisson(0.4, (70, 53)).astype(np.float32)
    zone = rng.integers(0, 256, image.shape).astype(np.uint8)
    counts = window_counts(image, 0.5, radius)
    np.testing.assert_array_equal(region_histogram(image, counts, 0.5, radius, zone),
                                  _region_histogram_plain(image, counts, 0.5, radius, zone))


@pytest.mark.parametrize("seed", range(4))
def test_without_residue_equals_drop_residue_on_the_zone_background(seed):
    """The compiled residue test against :func:`drop_residue` (whose Poisson tail is checked
    against ``scipy.stats.poisson.sf`` in test_speckle_tissue.py) with the background of each
    pixel's zone, infinite and NaN levels included, and without a zone map."""
    from plexwash.qc.steps.speckle_tests import drop_residue, without_residue

    rng = np.random.default_rng(seed)
    shape = (57, 64)
    levels = rng.uniform(0, 3, 256)
    levels[rng.integers(0, 256, 8)] = np.inf
    levels[rng.integers(0, 256, 4)] = np.nan
    zone = rng.integers(0, 256, shape).astype(np.uint8)
    zone[:, :20] = rng.integers(0, 4, (shape[0], 20))
    spilled = (rng.uniform(0, 6, shape) * (rng.uniform(size=shape) < 0.7)).astype(np.float32)
    image = np.maximum(rng.poisson(2.0, shape) - spilled + rng.normal(0, 0.3, shape), 0).astype(np.float32)
    image[rng.uniform(size=shape) < 0.1] = -0.5
    for alpha in (1e-3, 0.05, 0.5):
        for zone_map in (zone, None):
            background = np.nan_to_num(levels[zone_map] if zone_map is not None else np.full(shape, levels[0]),
                                       posinf=1e30)
            want = drop_residue(image, spilled, background, alpha)
            got = without_residue(image, spilled, zone_map, levels, alpha)
            np.testing.assert_array_equal(got, want)
            assert (got is image) == (want is image)
    assert without_residue(image, None, zone, levels, 0.05) is image
    assert without_residue(image, spilled, zone, levels, 0.0) is image


def _filter_parameters_plain(settings, background, zone=None) -> dict:
    """The kernel's tables made by each table's own function on every tabulated zone (the
    reference: ``speckle_tests.filter_parameters`` before its rows were shared by level)."""
    from plexwash.qc.steps import speckle_tests as st

    zoned = background.zone_levels is not None
    if zoned:
        levels, rates = background.zone_levels, None
    else:
        levels, rates = np.array([background.level]), np.array([background.rate])
    tabled = st.tabulated_levels(levels, zone) if zoned else levels
    tables = {"threshold": settings.threshold, "value_alpha": settings.value_alpha}
    min_count, value_cut = st.zone_tables(tabled, rates=rates, radius=int(settings.radius), alpha=settings.alpha,
                                          **tables)
    if int(settings.wide_radius) > 0:
        support, _ = st.zone_tables(tabled, rates=rates, radius=int(settings.radius),
                                    alpha=settings.support_alpha, **tables)
        wide, _ = st.zone_tables(tabled, rates=rates, radius=int(settings.wide_radius), alpha=settings.alpha,
                                 **tables)
    else:
        support = np.full_like(min_count, np.iinfo(np.int32).max)
        wide = np.full((min_count.shape[0], 2, 2), np.iinfo(np.int32).max, np.int32)
    return {"min_count": min_count, "wide_min_count": wide, "support_min_count": support, "value_cut": value_cut,
            "line_min_count": st.line_sum_tables(tabled, settings),
            "rim_min_count": st.rim_tables(tabled, rates, settings), "rim_value": st.rim_values(tabled, settings)}


@pytest.mark.parametrize("seed", range(4))
def test_filter_parameters_equal_each_tables_own_function(seed):
    """Rows made once per distinct level, the binomial searches of one alpha sharing a grid: the
    same tables as :func:`zone_tables`, :func:`line_sum_tables`, :func:`rim_tables` and
    :func:`rim_values` give on every zone, with and without a zone map, for levels that are 0,
    saturated, infinite, NaN or above ``line_max_level``, and for settings that turn parts off or
    make alphas equal."""

    from plexwash.qc.background_context import zone_factors
    from plexwash.qc.steps import speckle as sp
    from plexwash.qc.steps.speckle_settings import SpeckleSettings
    from plexwash.qc.steps.speckle_tests import filter_parameters

    rng = np.random.default_rng(seed)
    variants = [SpeckleSettings(), SpeckleSettings(radius=3, wide_radius=0, rim_alpha=0.0, line_half=0),
                SpeckleSettings(alpha=0.2, support_alpha=0.2, rim_alpha=0.2, line_side_alpha=1.0),
                SpeckleSettings(radius=1, wide_radius=7, threshold=2.0, line_max_level=5.0)]
    settings = variants[seed]
    regions = rng.uniform(0.01, 4.0, 2)
    levels = np.where(np.arange(256) < 128, regions[0], regions[1]) * zone_factors()
    levels[rng.integers(0, 256, 3)] = np.inf
    levels[rng.integers(0, 256, 2)] = 0.0
    levels[rng.integers(0, 256, 2)] = np.nan
    zone = rng.integers(0, 256, (40, 50)).astype(np.uint8)
    zone[:, :25] = rng.choice(np.array([10, 11, 200], np.uint8), (40, 25))
    for rate in (rng.uniform(0.01, 0.6), 1.0):
        base = sp._background_from_histogram(None, settings, rate=rate)
        cases = [(base, None), (base._replace(zone_levels=levels), zone), (base._replace(zone_levels=levels), None)]
        for background, zone_map in cases:
            got = filter_parameters(settings, background, zone_map)
            want = _filter_parameters_plain(settings, background, zone_map)
            for key, value in want.items():
                assert got[key].dtype == value.dtype, key
                np.testing.assert_array_equal(got[key], value, err_msg=key)


def test_cached_scalar_searches_equal_the_plain_searches():
    """One-entry binomial counts, Poisson levels and minimum values come from bounded caches:
    the same numbers as the plain search (``scipy.special.bdtrc``) and ``scipy.special.gammaincinv``
    on first and repeated asks, in fresh arrays the caller may change."""
    from plexwash.qc.steps.speckle_tests import binomial_min_count, poisson_level, poisson_min_value
    from scipy import special

    rng = np.random.default_rng(8)
    for trials, rate, alpha in zip(rng.integers(0, 130, 40), rng.uniform(0, 1, 40), rng.choice([1e-6, 0.01, 0.2], 40),
                                   strict=True):
        for _ in range(2):
            got = binomial_min_count(np.array([trials]), np.float64(rate), alpha)
            assert got.shape == (1,) and got.dtype == np.int64
            assert got[0] == _binomial_min_count_plain(trials, rate, alpha)
            got[0] = -1  # the cache keeps its own number
        level = poisson_level(rate, 0.5)
        assert level == poisson_level(float(rate), 0.5) == float(special.gammaincinv(1.0, rate))
        assert poisson_min_value(np.float64(level), alpha) == poisson_min_value(level, alpha)
    assert np.isinf(poisson_min_value(np.nan, 0.01)) and np.isinf(poisson_min_value(np.inf, 0.01))


@pytest.mark.parametrize("alpha", [1e-12, 1e-6, 0.003, 0.01, 0.2])
def test_grid_walk_equals_the_bisection_of_every_entry(alpha):
    """The table search that walks each rate up the trial counts gives what the bisection of each
    entry gives (both ask scipy's ``bdtrc``, ``scipy.special.cython_special``), on trial counts
    out of order and with gaps, rates over twelve orders of magnitude, 0, 1 and NaN."""
    from plexwash.qc.steps import _search_kernels as sk
    from plexwash.qc.steps._speckle_search import _binomial_grid, _special_functions

    rng = np.random.default_rng(int(-np.log10(alpha) * 7))
    rates = np.concatenate([10.0 ** rng.uniform(-12, 0, 300), rng.uniform(0, 1, 200),
                            1.0 - 10.0 ** rng.uniform(-12, -1, 20), [0.0, 1.0, np.nan]])
    trials = np.concatenate([np.arange(0, 130), [200, 143, 167, 131, 121, 0, 3]])
    rng.shuffle(trials)
    grid_trials, grid_rates = np.meshgrid(trials, rates, indexing="ij")
    expected = np.empty(grid_trials.size, np.int64)
    sk.binomial_search(grid_trials.ravel(), grid_rates.ravel(), np.full(grid_trials.size, alpha),
                       _special_functions()[0], expected)
    np.testing.assert_array_equal(_binomial_grid(trials, rates, alpha), expected.reshape(grid_trials.shape))


def test_cached_grid_columns_equal_the_searches_and_stay_bounded():
    """Columns of the table search kept by exact trials, rate and alpha (``_COLUMNS``): grids
    asked again, in another order or mixed with new rates, equal each entry's bisection (scipy's
    ``bdtrc``, ``scipy.special.cython_special``); a grid handed out does not share the cache's
    memory, and the cache holds at most its size."""
    from plexwash.qc.steps import _search_kernels as sk
    from plexwash.qc.steps._speckle_search import (
        _COLUMNS,
        SCALAR_CACHE,
        _binomial_grid,
        _special_functions,
    )

    def plain(trials, rates, alpha):
        grid_trials, grid_rates = np.meshgrid(trials, rates, indexing="ij")
        out = np.empty(grid_trials.size, np.int64)
        sk.binomial_search(grid_trials.ravel(), grid_rates.ravel(), np.full(grid_trials.size, alpha),
                           _special_functions()[0], out)
        return out.reshape(grid_trials.shape)

    rng = np.random.default_rng(5)
    trials = np.array([0, 3, 8, 15, 24, 35, 48, 63, 80, 99, 120])
    first = rng.uniform(0, 0.6, 5)
    second = np.concatenate([first[::-1][:3], rng.uniform(0, 0.6, 4)])
    for alpha in (0.01, 1e-6):
        for rates in (first, second, first, second[::-1]):
            got = _binomial_grid(trials, rates, alpha)
            np.testing.assert_array_equal(got, plain(trials, rates, alpha))
            got[...] = -1  # the caller's copy
        np.testing.assert_array_equal(_binomial_grid(trials, first, alpha), plain(trials, first, alpha))
    for rate in rng.uniform(0, 1, SCALAR_CACHE + 10):
        _binomial_grid(trials[:2], np.array([rate]), 0.2)
    assert len(_COLUMNS._entries) <= SCALAR_CACHE
