"""Hot pixels against one-pixel specks of real stain (issue 12).

On one channel a one-pixel speck of stain and a hot pixel are both isolated extreme
values; what tells them apart is the amplitude above the neighbourhood. The amplitudes
here follow the independent cohort ``benchmarks/tissue_cohort.py`` (one-pixel specks of
15-60 counts, hot pixels adding 100-900 counts) and the demo generator (hot pixels
150-900 counts); the margin ``min_excess = 50`` counts is common practice for imaging mass
cytometry hot-pixel filtering (value from memory).
"""

from __future__ import annotations

import numpy as np
from plexwash.qc.steps.hot_pixels import remove_hot_pixels
from plexwash.qc.steps.speckle import remove_speckle
from scipy import ndimage as ndi


def specks_and_hot_pixels(seed=0, shape=(200, 220), n_specks=40, n_hot=40):
    """Poisson background 0.1 counts/px with one-pixel specks (12-30 counts) and hot pixels."""
    rng = np.random.default_rng(seed)
    img = rng.poisson(0.1, shape).astype(np.float32)
    places = rng.choice(img.size, n_specks + n_hot, replace=False)
    ys, xs = np.unravel_index(places, shape)
    inner = (ys > 2) & (ys < shape[0] - 3) & (xs > 2) & (xs < shape[1] - 3)
    ys, xs = ys[inner], xs[inner]
    specks = np.zeros(shape, bool)
    hot = np.zeros(shape, bool)
    n = len(ys) // 2
    specks[ys[:n], xs[:n]] = True
    hot[ys[n:], xs[n:]] = True
    img[specks] = rng.poisson(rng.uniform(12, 30, n)).astype(np.float32)
    img[hot] += rng.uniform(100, 900, len(ys) - n).astype(np.float32)
    return img, specks, hot


def test_one_pixel_specks_stay_and_hot_pixels_go():
    img, specks, hot = specks_and_hot_pixels()
    out, removed, st = remove_hot_pixels(img)
    peak = ndi.maximum_filter(img, footprint=np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]]), mode="mirror")
    assert np.all(out[hot] <= peak[hot])  # every hot pixel restored from its neighbours
    assert not removed[specks].any()  # no speck touched
    assert st["n_pixels"] == int(hot.sum())


def test_the_old_margin_took_the_specks():
    """Regression: with the former margin of 10 counts the same specks were restored as hot."""
    img, specks, _ = specks_and_hot_pixels()
    _, removed, _ = remove_hot_pixels(img, min_excess=10.0)
    assert (removed[specks] > 0).mean() >= 0.9


def test_hot_pixel_on_a_cell_still_found():
    rng = np.random.default_rng(4)
    img = rng.poisson(0.1, (60, 60)).astype(np.float32)
    img[20:35, 20:35] = rng.poisson(20.0, (15, 15))
    img[27, 27] += 150.0  # 150 counts on a 20-count plateau: the flat Poisson test
    out, removed, _ = remove_hot_pixels(img)
    assert removed[27, 27] > 100 and out[27, 27] < 40  # restored to the plateau (about 20)
    assert np.count_nonzero(removed) == 1


def test_speck_survives_the_whole_default_wash_order():
    """Hot pixels, then speckle, with the recipe defaults: the one-pixel specks keep their counts."""
    img, specks, hot = specks_and_hot_pixels(seed=1)
    cleaned = remove_hot_pixels(img).image
    out = remove_speckle(cleaned).image
    assert np.array_equal(out[specks], img[specks])
    assert np.all(out[hot] < 10)
