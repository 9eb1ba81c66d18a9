"""The shared variation's medians taken a slice of pixels at a time equal the whole-region form."""

import numpy as np
from plexwash.qc import background


def _whole_region(rates, region_rates, mask):
    """The form before slicing: every channel's ratios over a region in one float64 array."""
    rates = np.asarray(rates, np.float64)
    out = np.ones(rates.shape[1:], np.float64)
    for k, region in enumerate(background._regions(rates.shape[1:], mask)):
        valid = np.isfinite(region_rates[:, k]) & (region_rates[:, k] > 0)
        if not region.any() or not valid.any():
            continue
        values = np.median(rates[valid][:, region] / region_rates[valid, k][:, None], axis=0)
        out[region] = values / max(float(values.mean()), 1e-12)
    return out.astype(np.float32)


def test_sliced_medians_equal_the_whole_region(monkeypatch):
    rng = np.random.default_rng(3)
    rates = rng.gamma(2.0, 0.5, (7, 41, 53)).astype(np.float32)
    mask = np.zeros((41, 53), bool)
    mask[5:30, 10:40] = True
    region_rates = rng.uniform(0.2, 2.0, (7, 2))
    region_rates[2, 0] = np.nan  # a channel without a rate in one region is left out there
    expected = _whole_region(rates, region_rates, mask)
    for size in (1, 6, 100, 1 << 15):  # slices smaller than, across and larger than a region
        monkeypatch.setattr(background, "MEDIAN_SLICE", size)
        got = background.shared_modulation(rates, region_rates, mask)
        assert got.dtype == np.float32
        np.testing.assert_array_equal(got, expected)
