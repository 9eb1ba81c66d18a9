"""The wash on tissue lying on glass (issue 12): local background rates in the speckle step,
the residue of removed spillover, and the same result along every wash path.

Truth comes from the INDEPENDENT generator ``benchmarks/tissue_cohort.py`` (it shares no
code with example_stack/generate.py and never imports plexwash): one plain ROI and one
low-count ROI, washed with the default recipe and the generator's true spillover matrix.
Figures as in ``benchmarks/tissue_accuracy.py`` (hot pixels of the truth left out).
Measured on this fixture (seed 3, plain / low-count): background removed in tissue 98.0 /
98.5 % (95.5 / 91.7 % before the rim rule), on glass 99.6 / 99.7 %; kept: worst cell stain
98.8 / 98.8 % (96.6 / 95.0 % before the hot-pixel margin and the lone-pixel rule), dim stain
100.6 / 97.9 %, fibres 98.6 / 92.3 % (96.9 / 92.3 % when the line test counted positive
pixels, 92.0 / 90.6 % before the line test), diffuse 96.4 / 83.2 %; ghost left in the failed
stain 0.6 / 1.1 %. Bounds leave a margin of a few points below those; where they sit below the issue's
targets (noted beside each), the target is not met yet. For contrast the single-rate
speckle step removes at most 80 % of tissue background on the same ROI.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc import SpilloverMatrix, default_recipe, wash
from plexwash.qc.background_context import roi_background
from plexwash.qc.io import Roi
from plexwash.qc.steps.speckle import SpeckleSettings, speckle_stack
from plexwash.qc.steps.speckle_tests import drop_residue

ROOT = Path(__file__).resolve().parents[1]


def _generator():
    spec = importlib.util.spec_from_file_location("plexwash_tissue_cohort_speckle",
                                                  ROOT / "benchmarks" / "tissue_cohort.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _figures(counts, truth, spill, names, recipe=None):
    roi = Roi(counts, tuple(names), Path("tissue.ome.tiff"))
    washed = wash(roi, recipe, spillover=SpilloverMatrix(list(names), spill))
    out = np.asarray(washed.data, np.float64)
    raw = counts.astype(np.float64)
    rows = truth["row_factor"][None, :, None]
    own = truth["signal"].astype(np.float64) * rows
    spilled = np.tensordot(spill, truth["signal"].astype(np.float64), axes=(0, 0)) * rows
    background = truth["background"] * rows
    hot = np.zeros(counts.shape, bool)
    for c, y, x, _ in truth["hot_pixels"]:
        hot[:, y, x] |= c < 0
        if c >= 0:
            hot[c, y, x] = True
    quiet = (spilled == 0) & ~hot
    fig = {}
    for where, region in (("tissue", truth["tissue"]), ("glass", ~truth["tissue"])):
        sel = quiet & region[None]
        fig[where] = 1.0 - out[sel].sum() / raw[sel].sum()
    roles = truth["roles"]
    for role in ("cell", "dim", "dna", "fibre", "diffuse"):
        kept = []
        for name in roles[role]:
            c = names.index(name)
            sel = (own[c] > 0) & ~hot[c]
            kept.append(out[c][sel].sum() / (own[c] + background[c])[sel].sum())
        fig[role] = min(kept)
    c = names.index(roles["failed"][0])
    ghost = (spilled[c] > 0) & ~hot[c]
    fig["ghost"] = out[c][ghost].sum() / raw[c][ghost].sum()
    return fig, washed


@pytest.fixture(scope="module")
def cases():
    tc = _generator()
    rng = np.random.default_rng(3)
    names = [p[0] for p in tc.STAINS]
    spill, _ = tc.physical_spillover(names, rng)
    roles: dict[str, list[str]] = {}
    for p in tc.STAINS:
        roles.setdefault(p[2], []).append(p[0])
    out = {}
    for kind, shape in (("plain", (300, 330)), ("low", (260, 260))):
        counts, truth = tc.simulate_roi(rng, shape, kind, spill)
        truth["background"] = tc.background_map(truth)
        truth["roles"] = roles
        out[kind] = (counts, truth, spill, names)
    return out


@pytest.fixture(scope="module")
def figures(cases):
    return {kind: _figures(*case)[0] for kind, case in cases.items()}


def test_background_is_removed_in_tissue_and_on_glass(figures):
    plain, low = figures["plain"], figures["low"]
    assert plain["tissue"] >= 0.97 and low["tissue"] >= 0.97  # issue 12 target 97 % (met with the rim rule)
    assert plain["glass"] >= 0.99 and low["glass"] >= 0.99  # issue 12 target 99 %


def test_cells_fibres_and_diffuse_stains_are_kept(figures):
    for fig in figures.values():
        assert fig["cell"] >= 0.97  # worst cell stain (hot-pixel step included); target 98 %
        assert fig["dim"] >= 0.95  # the dim stain, ~3 counts on a few % of pixels; target 98 %
        assert fig["fibre"] >= 0.91  # 1-2 px fibres at 1-4 counts; target 97 %
        assert fig["diffuse"] >= 0.78  # 0.3-0.8 counts over the stroma (0.15-0.4 low-count); target 95 %
    # summed counts on the line (Poisson test) with the side and flank tests: 98.6 % (96.9 % counting positives)
    assert figures["plain"]["fibre"] >= 0.97


def test_ghost_left_in_a_failed_stain(figures):
    for fig in figures.values():
        assert fig["ghost"] <= 0.05  # issue 12 target 5 % of the raw counts its ghosts bring


def test_single_rate_speckle_leaves_tissue_background(cases):
    """The same ROI with the old behaviour (one rate per channel, no residue test) for contrast."""
    recipe = default_recipe().replace("speckle", local_rates=False, residue_alpha=0.0, wide_radius=0,
                                      edge_alpha=0.0)
    single, _ = _figures(*cases["plain"], recipe=recipe)
    assert single["tissue"] <= 0.8 and single["ghost"] >= 0.05


def test_chunked_speckle_with_context_equals_numpy(cases):
    import dask.array as da

    counts, *_ = cases["plain"]
    stack = counts[:6].astype(np.float32)
    context = roi_background(stack.__getitem__, range(6), stack.shape[1:])
    spilled = np.abs(np.random.default_rng(0).normal(0, 0.6, stack.shape)).astype(np.float32)
    settings = SpeckleSettings()
    whole = speckle_stack(stack, settings, context=context, spilled=spilled)
    for chunks in ((6, 64, 80), (3, 150, 47)):
        lazy = speckle_stack(da.from_array(stack, chunks=chunks), settings, context=context,
                             spilled=da.from_array(spilled, chunks=chunks))
        np.testing.assert_array_equal(lazy.image.compute(), whole.image)


def test_residue_test_matches_scipy_poisson_tail():
    """drop_residue against scipy.stats.poisson.sf on the 3 x 3 window sums (scipy reference)."""
    from scipy import ndimage, stats

    rng = np.random.default_rng(1)
    spilled = rng.uniform(0.0, 3.0, (40, 50)).astype(np.float32)
    background = np.full(spilled.shape, 0.2)
    measured = rng.poisson(spilled + background + np.where(rng.random(spilled.shape) < 0.2, 6.0, 0.0))
    image = np.maximum(measured - spilled, 0).astype(np.float32)
    got = drop_residue(image, spilled, background, 0.05)
    ones = np.ones((3, 3))
    y = ndimage.convolve(np.floor(image.astype(np.float64) + spilled + 0.5), ones, mode="constant")
    mu = ndimage.convolve(spilled.astype(np.float64) + background, ones, mode="constant")
    tail = stats.poisson.sf(np.maximum(y, 1) - 1, mu)  # P(N >= y), scipy.stats.poisson.sf
    candidates = (image > 0) & (spilled > 0) & (spilled >= background)
    expected = np.where(candidates & (tail >= 0.05), 0.0, image)
    np.testing.assert_allclose(got, expected)
    assert (got == 0).sum() > (image == 0).sum()
