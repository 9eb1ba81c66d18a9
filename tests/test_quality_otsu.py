"""Otsu's threshold from the channel's histogram equals scikit-image's, bit for bit.

Reference: ``skimage.filters.threshold_otsu(hist=(counts, centers))`` (scikit-image), which
``channel._otsu`` handed the histogram to before its steps were compiled.
"""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.quality import channel
from plexwash.qc.quality._fit_kernels import otsu_index
from skimage.filters import threshold_otsu


def _images(rng):
    for dtype in (np.float32, np.float64):
        yield np.log1p(rng.poisson(rng.gamma(0.5, 4.0, (96, 96)))).astype(dtype)
        yield rng.normal(0.0, 1.0, (50, 70)).astype(dtype)
        yield (rng.random((40, 40)) < 0.1).astype(dtype) * 3.0 + 1.0  # two values
        sparse = np.zeros((64, 64), dtype)
        sparse[rng.random((64, 64)) < 0.02] = rng.gamma(2.0, 2.0, 1)[0]
        sparse[0, 0] = -0.5
        yield sparse  # empty bins inside, both ends full
        yield rng.gamma(0.2, 1.0, 5000).astype(dtype) * 1e-30  # tiny range


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_otsu_is_skimages_bit_for_bit(seed):
    rng = np.random.default_rng(seed)
    for image in _images(rng):
        low, high = float(image.min()), float(image.max())
        if not high > low:
            continue
        edges = np.linspace(low, high, 257, endpoint=True, dtype=np.result_type(low, high, image))
        counts, _ = np.histogram(image, bins=edges)
        centers = (edges[:-1] + edges[1:]) / 2.0
        expected = threshold_otsu(hist=(counts, centers))
        got = channel._otsu(image, low, high)
        assert type(got) is type(expected) and np.asarray(got).tobytes() == np.asarray(expected).tobytes()


def test_histograms_with_empty_ends_are_trimmed_as_skimage_trims_them():
    rng = np.random.default_rng(9)
    for _ in range(300):
        counts = rng.poisson(rng.gamma(0.3, 20.0), 256).astype(np.int64)
        counts[:int(rng.integers(0, 40))] = 0
        counts[256 - int(rng.integers(1, 40)):] = 0
        if np.count_nonzero(counts) < 2:
            continue
        for dtype in (np.float32, np.float64):
            centers = np.linspace(-1.0, 3.0, 256).astype(dtype)
            expected = threshold_otsu(hist=(counts, centers))
            got = centers[otsu_index(counts, centers)]
            assert np.asarray(got).tobytes() == np.asarray(expected).tobytes()
