"""The quality measurements' compiled replacements give their references' bits.

References: ``scipy.ndimage.gaussian_filter`` (mode ``reflect``), ``uniform_filter`` and
``maximum_filter`` (mode ``constant``), ``scipy.stats.poisson.isf``.
"""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.quality._kernels import gaussian_reflect
from plexwash.qc.quality.channel import _split_image, gaussian_weights
from scipy import ndimage


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("sigma", [1.0, 0.5, 2.0, 0.1, 3.3])
def test_gaussian_equals_scipy_bit_for_bit(dtype, sigma):
    rng = np.random.default_rng(int(sigma * 10))
    # tiny shapes reflect more than once (lines shorter than the filter's radius)
    for shape in [(1, 1), (1, 7), (3, 2), (2, 9), (5, 5), (96, 96), (97, 131), (300, 17)]:
        image = np.log1p(rng.gamma(0.7, 5.0, shape)).astype(dtype)
        reference = ndimage.gaussian_filter(image, sigma, mode="reflect")  # scipy.ndimage
        out = np.empty_like(image)
        gaussian_reflect(image, gaussian_weights(sigma), out)
        assert out.tobytes() == reference.tobytes(), shape


@pytest.mark.parametrize("sigma", [1.0, 0.0, 1e-16])
def test_split_image_equals_log_then_scipy_gaussian(sigma):
    rng = np.random.default_rng(3)
    clean = rng.poisson(3.0, (64, 80)).astype(np.float32)
    clean[0, 0] = -2.0  # negatives count as 0
    expected = np.log1p(np.maximum(clean, 0.0))
    if sigma > 0:
        expected = ndimage.gaussian_filter(expected, sigma, mode="reflect")  # scipy.ndimage
    assert _split_image(clean, sigma).tobytes() == expected.tobytes()


def test_poisson_isf_equals_scipy_stats():
    from plexwash.qc.quality.stripes import BRIGHT_TAIL, LOUD_TAIL, poisson_isf
    from scipy import stats

    rng = np.random.default_rng(5)
    rates = np.r_[10.0 ** rng.uniform(-6, 4, 3000), [1e-300, 0.5, 1.0, 2.0, 7.0, 1e6]]
    tails = np.array([LOUD_TAIL, BRIGHT_TAIL, 0.5, 1e-12])
    for rate in rates.tolist():
        expected = stats.poisson.isf(tails, rate)  # reference: scipy.stats.poisson.isf
        assert poisson_isf(tails, rate).tobytes() == np.asarray(expected, np.float64).tobytes()


def test_loud_pixels_mark_the_levels_as_the_masks_did():
    from plexwash.qc.quality._kernels import mark_levels

    rng = np.random.default_rng(6)
    plane = rng.gamma(0.5, 8.0, (50, 70)).astype(np.float32)
    plane[0, :5] = [np.nan, np.inf, -np.inf, 3.0, 9.0]
    for loud, bright in ((2.0, 4.0), (5.0, 5.0), (3.0, 11.0)):
        expected = np.zeros(plane.shape, np.int8)
        expected[plane >= loud] = 1
        expected[plane >= bright] = 2
        out = np.empty(plane.shape, np.int8)
        mark_levels(plane, loud, bright, out)
        np.testing.assert_array_equal(out, expected)


def test_window_sums_equal_scipy_filters():
    from plexwash.qc.quality.excess import window_sums

    rng = np.random.default_rng(11)
    for shape in [(3, 3), (3, 17), (4, 5), (24, 24), (63, 41), (252, 252)]:
        for _ in range(4):
            n = rng.poisson(rng.gamma(1.0, 30.0, shape)).astype(float) * rng.uniform(0.1, 3.0)
            mu = rng.gamma(2.0, 10.0, shape)
            area = np.full(shape, 16.0)
            area[-1] = 4.0
            area[:, -1] *= 0.5
            # reference: scipy.ndimage.uniform_filter / maximum_filter, as the test used them
            expected = [ndimage.uniform_filter(v, 3, mode="constant") * 9 for v in (n, mu, area)]
            largest = ndimage.maximum_filter(n - mu, 3, mode="constant", cval=0.0)
            expected[0] = expected[0] - np.maximum(largest, 0.0)
            n_w, mu_w, a_w = window_sums(n, mu, area)
            assert mu_w.tobytes() == expected[1].tobytes() and a_w.tobytes() == expected[2].tobytes()
            assert np.array_equal(n_w, expected[0]), shape  # the same, up to a zero's sign
    # not finite: scipy's own filters
    n = np.full((4, 4), 5.0)
    mu = np.full((4, 4), 1.0)
    mu[1, 1] = np.inf
    got = window_sums(n, mu, np.ones((4, 4)))
    assert np.isinf(got[1]).any()


def test_excess_area_equals_the_scipy_form():
    from plexwash.qc.quality.excess import measure_excess_area, poisson_tail_below
    from plexwash.qc.quality.settings import QualitySettings

    def reference(n, mu, area, settings):  # the test as written with scipy.ndimage's filters
        excess = poisson_tail_below(n, mu, settings.empty_alpha) & (
            n - mu >= settings.min_excess * area)
        n_w, mu_w, a_w = (ndimage.uniform_filter(v, 3, mode="constant") * 9 for v in (n, mu, area))
        largest = ndimage.maximum_filter(n - mu, 3, mode="constant", cval=0.0)
        n_w = n_w - np.maximum(largest, 0.0)
        excess |= poisson_tail_below(n_w, mu_w, settings.empty_alpha) & (
            n_w - mu_w >= settings.min_excess * a_w)
        return float(area[excess].sum())

    rng = np.random.default_rng(12)
    settings = QualitySettings()
    for trial in range(60):
        shape = tuple(int(v) for v in rng.integers(3, 40, 2))
        mu = rng.gamma(2.0, 3.0, shape)
        n = rng.poisson(mu * rng.choice([1.0, 1.0, 2.5], shape)).astype(float)
        n[rng.random(shape) < 0.1] = -0.0  # signed zeros: washed bins
        mu[rng.random(shape) < 0.05] = 1.0 + trial % 2  # bins at the floor
        area = np.full(shape, 16.0)
        got = measure_excess_area(n, mu, area, settings)
        assert got == reference(n, mu, area, settings)


def test_quiet_line_counts_equal_numpys_sums():
    from plexwash.qc.quality.stripes import line_parts, quiet_line_counts

    def reference(image, keep):  # the numpy form the counts were written in
        edges = line_parts(image.shape[1])
        out = np.zeros((2, len(edges) - 1, image.shape[0]))
        middle = keep[1:-1]
        line = np.multiply(image[1:-1], middle, dtype=np.float64)
        beside = np.add(image[:-2], image[2:], dtype=np.float64)
        beside *= middle
        out[0, :, 1:-1] = np.add.reduceat(line, edges[:-1], axis=1).T  # numpy's pairwise sums
        out[1, :, 1:-1] = np.add.reduceat(beside, edges[:-1], axis=1).T
        return out

    rng = np.random.default_rng(13)
    for shape in [(3, 1), (3, 9), (5, 64), (40, 130), (17, 257), (9, 1100), (300, 96)]:
        for dtype in (np.float32, np.float64, np.uint16):
            image = (rng.gamma(0.6, 9.0, shape) * 10 ** rng.uniform(-2, 2)).astype(dtype)
            if dtype != np.uint16:
                image[rng.random(shape) < 0.05] = -0.0  # signed zeros sum as numpy sums them
            keep = rng.random(shape) < 0.8
            got = quiet_line_counts(image, keep)
            assert got.tobytes() == reference(image, keep).tobytes(), (shape, dtype)


def test_bin_sums_equal_numpys():
    from plexwash.qc.quality.channel import _bin_sums, _bin_sums_numpy

    rng = np.random.default_rng(14)
    for shape in [(1, 1), (3, 5), (8, 8), (33, 70), (96, 96), (101, 257)]:
        for dtype in (np.float32, np.float64, np.uint16):
            values = (rng.gamma(0.6, 9.0, shape) * 10 ** rng.uniform(-2, 3)).astype(dtype)
            if dtype != np.uint16:
                values[rng.random(shape) < 0.1] = -0.0
            for size in (1, 2, 3, 4, 7, 16):
                # reference: numpy's band sums and np.add.reduceat
                assert _bin_sums(values, size).tobytes() == _bin_sums_numpy(values, size).tobytes()


def test_poisson_tail_below_near_the_mean_equals_gammainc():
    """Counts at, just below and just above their mean (where the verdict kernel now stops
    before the root) answer as ``scipy.special.gammainc(n, mu) < alpha`` does."""
    from plexwash.qc.quality.excess import poisson_tail_below
    from scipy import special

    rng = np.random.default_rng(21)
    mu = np.concatenate([rng.gamma(1.0, 50.0, 4000), [0.0, 1e-3, 0.5, 95.0, 1e4]])
    for n in (mu, np.nextafter(mu, np.inf), np.nextafter(mu, -np.inf), mu + np.sqrt(mu),
              np.floor(mu + 2.0 * np.sqrt(mu)), rng.poisson(mu).astype(np.float64)):
        n = np.maximum(n, 0.0)
        for alpha in (0.05, 1e-3):
            with np.errstate(divide="ignore"):
                assert np.array_equal(poisson_tail_below(n, mu, alpha),
                                      special.gammainc(n, mu) < alpha)  # scipy.special


def test_loud_pixels_take_the_lower_half_as_the_mask_did():
    """The compiled selection of the values at most the median gives the values, and so the
    levels, of ``plane[plane <= median]`` (the previous form, kept here as the reference)."""
    from plexwash.qc.quality._kernels import values_at_most
    from plexwash.qc.quality.stripes import BRIGHT_TAIL, LOUD_TAIL, loud_pixels, poisson_isf

    rng = np.random.default_rng(16)
    gamma = rng.gamma(0.5, 8.0, (60, 70)).astype(np.float32)
    gamma[0, :4] = [np.nan, np.inf, -np.inf, -0.0]
    planes = [gamma, gamma[::2, 3:], rng.poisson(3.0, (40, 33)).astype(np.uint16),
              rng.poisson(0.4, (40, 33)).astype(np.uint8), np.zeros((5, 6), np.float32),
              rng.poisson(2.0, (30, 30)).astype(np.float64)]
    for plane in planes:
        for limit in (0.0, 1.0, float(np.nanmedian(plane)), -np.inf, np.nan):
            reference = plane[plane <= limit]
            out = np.empty(plane.size, plane.dtype)
            got = out[:values_at_most(np.ascontiguousarray(plane), limit, out)]
            assert got.tobytes() == reference.tobytes()
        median = np.percentile(plane, 50.0)  # numpy.percentile: the previous form's steps
        low = plane[plane <= median]
        rate = float(low.mean()) if low.size else 0.0
        loud, bright = 2.0, 4.0
        if rate > 0:
            above = poisson_isf(np.array([LOUD_TAIL, BRIGHT_TAIL]), rate)
            loud, bright = max(loud, float(above[0]) + 1.0), max(bright, float(above[1]) + 1.0)
        expected = np.where(plane >= bright, 2, np.where(plane >= loud, 1, 0)).astype(np.int8)
        assert loud_pixels(plane).tobytes() == expected.tobytes()
