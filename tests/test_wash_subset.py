"""A wash of some channels is the full wash restricted to them, bit for bit.

The studio's preview washes one channel at a time through this path; the full wash is
what a run writes. For random non-default recipes (every setting of the plane steps
moved, compensation by both methods, per-channel overrides), with and without a
spillover matrix, with a pass-through channel, numpy and dask, in memory and through
the engine's cache, the channels asked for equal those of the full wash exactly.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from plexwash.qc import wash
from plexwash.qc.errors import InputError
from plexwash.qc.io import read_roi
from plexwash.qc.recipe import default_recipe
from plexwash.qc.spillover import read_spillover
from plexwash.qc.steps.registry import STEPS
from plexwash.qc.wash import WashCache, compute


@pytest.fixture(scope="module")
def roi(demo_dir):
    """A demo ROI cut to 12 channels and 160 x 160 px, its 4th channel passed through."""
    full = read_roi(demo_dir / "cohort" / "roi_01.ome.tiff")
    keep = slice(0, 12)
    use = tuple(k != 3 for k in range(12))
    return dataclasses.replace(full, data=np.asarray(full.data[keep, 40:200, 60:220]),
                               channels=full.channels[keep], labels=full.labels[keep], use=use)


@pytest.fixture(scope="module")
def matrix(demo_dir):
    return read_spillover(demo_dir / "truth" / "spillover.csv")


def random_recipe(seed: int, channels):
    """Every hot-pixel and speckle setting moved off its default, method by seed, overrides."""
    rng = np.random.default_rng(seed)
    recipe = default_recipe()
    recipe = recipe.replace("hot_pixels", ratio=float(rng.uniform(2.0, 4.5)), min_excess=float(rng.uniform(2.0, 8.0)),
                            flat_sigmas=float(rng.uniform(2.5, 5.0)))
    recipe = recipe.replace("compensation", method=("linear", "nnls")[seed % 2])
    recipe = recipe.replace("speckle", threshold=float(rng.uniform(0.1, 0.45)), radius=int(rng.integers(3, 5)),
                            alpha=float(rng.uniform(0.02, 0.1)), value_alpha=float(10 ** rng.uniform(-8, -6.5)),
                            keep_touching=True, min_area=int(rng.integers(3, 5)),
                            wide_radius=int(rng.integers(3, 7)), support_alpha=float(rng.uniform(0.05, 0.3)),
                            edge_alpha=float(10 ** rng.uniform(-4, -2)), residue_alpha=float(rng.uniform(0.02, 0.2)))
    a, b, c, d = rng.choice(len(channels), 4, replace=False)
    recipe = recipe.replace("speckle", lone_alpha=float(10 ** rng.uniform(-14, -10)), line_half=int(rng.integers(2, 4)),
                            line_alpha=float(rng.uniform(0.005, 0.02)), rim_alpha=float(rng.uniform(0.02, 0.05)))
    recipe = recipe.replace("speckle", line_side_alpha=float(rng.uniform(0.1, 0.3)),
                            flank_alpha=float(rng.uniform(0.02, 0.05)), flank_distance=3, line_max_level=5.0,
                            line_extend=3, area_alpha=1e-5, area_half_alpha=0.02, chain_alpha=1e-3, chain_max=8,
                            chain_contacts=3)
    recipe = recipe.with_channel("hot_pixels", channels[a], flat_sigmas=0.0, ratio=9.0)
    recipe = recipe.with_channel("hot_pixels", channels[b], enabled=False)
    recipe = recipe.with_channel("speckle", channels[c], radius=1, min_area=1, keep_touching=False,
                                 local_rates=False)
    recipe = recipe.with_channel("speckle", channels[d], enabled=False)
    for step in STEPS:
        if step.per_channel:  # every setting of the step moved (enabled: in an override)
            moved = getattr(recipe, step.name)
            base = step.settings()
            assert all(getattr(moved, f.name) != getattr(base, f.name)
                       for f in dataclasses.fields(step.settings) if f.name not in ("enabled", "local_rates"))
    return recipe


def assert_subset_equals_full(part, full, wanted):
    index = [full.channels.index(c) for c in wanted]
    assert part.channels == tuple(wanted)
    assert part.labels == tuple(full.labels[i] for i in index)
    np.testing.assert_array_equal(part.data, full.data[index])
    assert list(part.removed) == list(full.removed) and list(part.stats) == list(full.stats)
    for step in full.removed:
        np.testing.assert_array_equal(part.removed[step], full.removed[step][index])
        assert part.stats[step] == [full.stats[step][i] for i in index]
    assert part.notes == full.notes


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("with_matrix", [False, True])
def test_subset_wash_equals_the_full_wash(roi, matrix, seed, with_matrix):
    recipe = random_recipe(seed, roi.channels)
    spillover = matrix if with_matrix else None
    full = wash(roi, recipe, spillover=spillover)
    assert ("compensation" in full.stats) == with_matrix
    rng = np.random.default_rng(100 + seed)
    subsets = [[roi.channels[k]] for k in (0, 3, 11)]  # 3: the pass-through channel
    subsets.append([roi.channels[k] for k in rng.permutation(len(roi.channels))[:5]])
    subsets.append(list(reversed(roi.channels)))
    for wanted in subsets:
        assert_subset_equals_full(wash(roi, recipe, spillover=spillover, channels=wanted), full, wanted)


def test_subset_of_a_lazy_roi_equals_the_full_numpy_wash(roi, matrix):
    import dask.array as da

    recipe = random_recipe(5, roi.channels)
    full = wash(roi, recipe, spillover=matrix)
    lazy = dataclasses.replace(roi, data=da.from_array(roi.data, chunks=(1, 64, 48)))
    wanted = [roi.channels[7], roi.channels[2]]
    part = wash(lazy, recipe, spillover=matrix, channels=wanted)
    assert part.is_lazy
    assert_subset_equals_full(compute(part), full, wanted)


def test_the_cache_reuses_earlier_steps_and_changes_no_bit(roi, matrix):
    cache = WashCache()
    channel = roi.channels[6]
    recipe = random_recipe(3, roi.channels)  # odd seed: nnls
    changes = [
        (recipe, ()),
        (recipe.with_channel("speckle", channel, radius=2), ("hot_pixels", "compensation")),
        (recipe.with_channel("speckle", channel, radius=2, alpha=0.2), ("hot_pixels", "compensation")),
        (recipe.replace("hot_pixels", flat_sigmas=1.5), ()),  # every channel's hot pixels change
        (recipe.replace("hot_pixels", flat_sigmas=1.5).replace("compensation", method="linear"), ("hot_pixels",)),
    ]
    for changed, reused in changes:
        part = wash(roi, changed, spillover=matrix, channels=[channel], cache=cache)
        assert cache.reused == reused
        assert_subset_equals_full(part, wash(roi, changed, spillover=matrix), [channel])
    other = roi.channels[9]  # another channel: the shared steps are kept, speckle is its own
    part = wash(roi, changes[-1][0], spillover=matrix, channels=[other], cache=cache)
    assert cache.reused == ("hot_pixels", "compensation")
    assert_subset_equals_full(part, wash(roi, changes[-1][0], spillover=matrix), [other])


def test_channels_are_named_once_and_must_exist(roi):
    with pytest.raises(InputError, match="no channel named 'nope'"):
        wash(roi, channels=["nope"])
    with pytest.raises(InputError, match="asked for twice"):
        wash(roi, channels=[roi.channels[0], roi.channels[0]])
    with pytest.raises(InputError, match="a list of channel names"):
        wash(roi, channels=roi.channels[0])
    by_label = wash(roi, channels=[roi.labels[1]])  # a stain sheet label works too
    assert by_label.channels == (roi.channels[1],)
