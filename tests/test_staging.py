"""The staged wash of lazy ROIs: its files, its passes, and equality with the in-memory wash."""

from __future__ import annotations

import gc
import os

import dask
import dask.array as da
import numpy as np
import pytest
from plexwash.qc import staging
from plexwash.qc.io import Roi, read_roi
from plexwash.qc.recipe import default_recipe
from plexwash.qc.staging import StagedStack, Staging, band_rows
from plexwash.qc.steps.registry import STEP_NAMES as STEPS
from plexwash.qc.steps.registry import step as registry_step
from plexwash.qc.wash import wash, wash_to_file


def _lazy(roi, chunks):
    if chunks is None:
        return roi
    return Roi(da.from_array(roi.data, chunks=chunks), roi.channels, roi.path, roi.labels, roi.use)


def _same_stats(result, eager):
    assert set(result.stats) == set(eager.stats)
    for step in eager.stats:
        for got, want in zip(result.stats[step], eager.stats[step], strict=True):
            assert got["channel"] == want["channel"] and got["ran"] == want["ran"]
            assert got["removed_fraction"] == pytest.approx(want["removed_fraction"], rel=1e-6, abs=1e-12)
            for key in ("n_pixels", "n_removed", "rate", "count_threshold", "method"):
                assert got.get(key) == want.get(key), (step, key)


# --------------------------------------------------------------------------- the staging file


def test_staged_stack_reads_back_what_was_written(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.normal(size=(4, 37, 29)).astype(np.float32)
    staged = StagedStack(tmp_path / "s.f32", data.shape)
    # written through dask.array.store, in chunks that cut rows and columns (reference: numpy)
    da.store(da.from_array(data, chunks=(3, 10, 8)), staged, lock=False)
    np.testing.assert_array_equal(np.asarray(staged), data)
    np.testing.assert_array_equal(staged[2], data[2])
    np.testing.assert_array_equal(staged[1, 5:20, 3:11], data[1, 5:20, 3:11])
    np.testing.assert_array_equal(staged[1:3, 30:, :], data[1:3, 30:, :])
    np.testing.assert_array_equal(staged.read_rows([3, 0], 4, 9), data[[3, 0], 4:9])
    staged.write_rows([0, 2], 7, np.zeros((2, 3, 29), np.float32))
    data[[0, 2], 7:10] = 0.0
    np.testing.assert_array_equal(staged.read_plane(2), data[2])
    assert (tmp_path / "s.f32").stat().st_size == data.nbytes
    staged.close()


def test_staged_stack_refuses_strided_slices(tmp_path):
    with StagedStack(tmp_path / "s.f32", (2, 8, 8)) as staged, pytest.raises(IndexError):
        staged[0, ::2]


def test_staging_folder_is_hidden_and_removed(tmp_path):
    out = tmp_path / "roi.ome.tiff"
    with Staging(out) as folder:
        folder.stack("a", (2, 4, 4)).write_plane(1, np.ones((4, 4), np.float32))
        assert folder.folder.name.startswith(".roi.ome.tiff.spill-")  # swept by a rerun
        assert folder.folder.exists()
    assert list(tmp_path.iterdir()) == []


def test_staging_can_go_to_another_folder(tmp_path):
    scratch = tmp_path / "scratch"
    out = tmp_path / "out" / "roi.ome.tiff"
    with Staging(out, staging_dir=scratch) as folder:
        assert folder.folder.parent == scratch
    assert list(scratch.iterdir()) == [] and not out.parent.exists()


def test_band_rows_hold_about_the_band_budget():
    rows = band_rows(50, 2000, 2000)
    assert rows * 50 * 2000 * 4 <= staging.BAND_BYTES < (rows + 1) * 50 * 2000 * 4
    assert band_rows(2, 10, 7) == 7 and band_rows(10**6, 10**6, 5) == 1


def test_chains_keep_order_and_bound_the_tasks(monkeypatch):
    seen = []
    monkeypatch.setattr(staging, "STAGE_WORKING_BYTES", 250)
    assert staging._chains(100) == 2 and staging._chains(1000) == 1
    out = staging._in_chains(lambda i: seen.append(i) or i * i, range(7), staging._chains(100))
    assert out == [i * i for i in range(7)] and sorted(seen) == list(range(7))


# --------------------------------------------------------------------------- the staged wash


@pytest.mark.parametrize("chunks", [None, (1, 96, 80), (7, 64, 128)],
                         ids=["numpy", "by-channel", "mixed-channels"])
def test_staged_wash_equals_the_in_memory_wash(unseen, tmp_path, chunks):
    """numpy ROIs are staged in memory; dask chunks of one channel are read plane by
    plane, others go through the copy pass. All equal :func:`wash` bit for bit."""
    roi, matrix, _ = unseen
    use = tuple(name != "Yb172" for name in roi.channels)  # one pass-through channel
    marked = Roi(roi.data, roi.channels, roi.path, use=use)
    eager = wash(marked, spillover=matrix)
    out = tmp_path / "w.ome.tiff"
    result = wash_to_file(_lazy(marked, chunks), out, spillover=matrix)
    np.testing.assert_array_equal(read_roi(out, lazy=False).data, eager.data)
    _same_stats(result, eager)
    assert [p.name for p in tmp_path.iterdir()] == ["w.ome.tiff"]


def test_staged_wash_with_steps_off_and_no_matrix(unseen, tmp_path):
    roi, _, _ = unseen
    recipe = (default_recipe().replace("hot_pixels", enabled=False)
              .with_channel("speckle", "Nd143", enabled=False))
    eager = wash(roi, recipe)
    result = wash_to_file(_lazy(roi, (1, 128, 128)), tmp_path / "w.ome.tiff", recipe)
    np.testing.assert_array_equal(read_roi(tmp_path / "w.ome.tiff", lazy=False).data, eager.data)
    assert set(result.stats) == {"speckle"} and result.notes == tuple(eager.notes)
    _same_stats(result, eager)


def test_staged_wash_to_ome_zarr(unseen, tmp_path):
    roi, matrix, _ = unseen
    recipe = default_recipe().replace("output", format="ome-zarr", tile=64)
    eager = wash(roi, spillover=matrix)
    out = tmp_path / "w.ome.zarr"
    wash_to_file(_lazy(roi, (1, 100, 100)), out, recipe, spillover=matrix)
    back = read_roi(out, lazy=False)
    assert back.channels == roi.channels
    np.testing.assert_array_equal(back.data, eager.data)


def test_a_failed_staged_wash_leaves_nothing(unseen, tmp_path, monkeypatch):
    roi, matrix, _ = unseen
    wash_module = __import__("sys").modules["plexwash.qc.wash"]

    def broken(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(wash_module, "write_stack", broken)
    open_before = len(os.listdir("/proc/self/fd")) if os.path.isdir("/proc/self/fd") else None
    with pytest.raises(OSError, match="disk full"):
        wash_to_file(_lazy(roi, (1, 128, 128)), tmp_path / "w.ome.tiff", spillover=matrix)
    assert list(tmp_path.iterdir()) == []
    if open_before is not None:  # the staging files are closed once nothing holds them
        gc.collect()
        assert len(os.listdir("/proc/self/fd")) <= open_before


def test_stats_of_every_step_are_present(unseen, tmp_path):
    roi, matrix, _ = unseen
    result = wash_to_file(_lazy(roi, (1, 128, 128)), tmp_path / "w.ome.tiff", spillover=matrix)
    assert list(result.stats) == list(STEPS)
    assert all(0.0 <= r["removed_fraction"] <= 1.0 for rows in result.stats.values() for r in rows)


def test_context_from_the_first_pass_sums_is_roi_backgrounds():
    """The staged wash fits the background context from block sums its first pass gathers;
    they give the context :func:`roi_background` makes from the planes, field for field."""
    from plexwash.qc.background_context import block_sums, context_of_block_sums, roi_background

    rng = np.random.default_rng(21)
    rate = np.full((90, 70), 0.5)
    rate[:, 30:] = 4.0  # tissue on the right
    stack = rng.poisson(np.broadcast_to(rate, (5, 90, 70))).astype(np.float32)
    used = [0, 2, 3, 4]
    want = roi_background(stack.__getitem__, used, (90, 70))
    got = context_of_block_sums(np.stack([block_sums(stack[c]) for c in used]), (90, 70))
    for field in ("tissue", "modulation", "zone"):
        np.testing.assert_array_equal(getattr(got, field), getattr(want, field))
    np.testing.assert_array_equal(got.model.rates, want.model.rates)
    np.testing.assert_array_equal(got.model.region_rates, want.model.region_rates)


@pytest.mark.parametrize(("first_off", "threads", "chunks"),
                         [(False, 2, (1, 32, 40)), (False, 2, None), (False, 1, None), (True, 2, (1, 32, 40))])
def test_staged_wash_with_the_context_fitted_aside_equals_the_in_memory_wash(tmp_path, first_off, threads, chunks):
    """With hot pixels on, the context comes from the first pass's block sums (for an ROI in
    memory fitted on a thread of its own when the wash has two threads, else before the next
    pass); with them off, speckle runs first and the context has a pass of its own. Always
    the pixels are those of the in-memory wash (bit for bit)."""
    rng = np.random.default_rng(8)
    rate = np.full((64, 80), 0.4)
    rate[:, 36:] = 3.0
    data = rng.poisson(np.broadcast_to(rate, (4, 64, 80))).astype(np.float32)
    data[1, 10, 10] = 400.0
    roi = Roi(data, ("Nd142", "Nd143", "Nd144", "Ir191"), tmp_path / "in.ome.tiff")
    recipe = default_recipe()
    if first_off:
        recipe = recipe.replace("hot_pixels", enabled=False)
    eager = wash(roi, recipe)
    with dask.config.set(scheduler="threads", num_workers=threads):  # 1: the context is fitted inline
        out = wash_to_file(_lazy(roi, chunks), tmp_path / "w.ome.tiff", recipe)
    np.testing.assert_array_equal(read_roi(out.output, lazy=False).data, eager.data)


@pytest.mark.parametrize("first_off", [False, True])
def test_a_small_roi_is_washed_directly_with_the_pixels_and_stats_of_the_passes(tmp_path, monkeypatch, first_off):
    """An ROI in memory of at most ``DIRECT_BYTES`` runs the same tasks in turn on the calling
    thread, with no dask graph (dask.compute is not called) and the context fitted inline;
    its pixels and stats equal those of the passes as dask tasks on two threads, bit for bit."""
    rng = np.random.default_rng(13)
    rate = np.full((48, 56), 0.6)
    rate[:, 20:] = 5.0
    data = rng.poisson(np.broadcast_to(rate, (5, 48, 56))).astype(np.float32)
    data[2, 7, 9] = 600.0
    names = ("Nd142", "Nd143", "Nd144", "Nd146", "Ir191")
    roi = Roi(data, names, tmp_path / "in.ome.tiff", use=(True, True, True, False, True))
    spill = np.eye(4) + np.diag(np.full(3, 0.03), 1)
    from plexwash.qc.spillover import SpilloverMatrix

    matrix = SpilloverMatrix(("Nd142", "Nd143", "Nd144", "Ir191"), spill)
    recipe = default_recipe().replace("hot_pixels", enabled=not first_off)
    assert data.nbytes <= staging.DIRECT_BYTES
    with dask.config.set(scheduler="threads", num_workers=2):
        monkeypatch.setattr(staging, "DIRECT_BYTES", 0)
        passes = wash_to_file(roi, tmp_path / "passes.ome.tiff", recipe, spillover=matrix)
        monkeypatch.undo()

        def no_graph(*args, **kwargs):
            raise AssertionError("a small ROI built a dask graph")

        monkeypatch.setattr(dask, "compute", no_graph)
        direct = wash_to_file(roi, tmp_path / "direct.ome.tiff", recipe, spillover=matrix)
    np.testing.assert_array_equal(read_roi(direct.output, lazy=False).data,
                                  read_roi(passes.output, lazy=False).data)
    np.testing.assert_array_equal(read_roi(direct.output, lazy=False).data,
                                  wash(roi, recipe, spillover=matrix).data)
    assert direct.stats == passes.stats and direct.notes == passes.notes


def test_context_fitted_into_staging_files_is_the_one_fitted_on_the_heap(tmp_path):
    """On disk, the first pass's block sums and the model's rates are memory maps of files in
    the staging folder (so a big ROI's do not sit on the heap): the context is the same, field
    for field, as the one fitted from arrays in memory."""
    rng = np.random.default_rng(22)
    rate = np.full((90, 70), 0.5)
    rate[:, 30:] = 4.0  # tissue on the right
    stack = rng.poisson(np.broadcast_to(rate, (5, 90, 70))).astype(np.float32)
    speckle = default_recipe().for_channels("speckle", ["a"])
    assert speckle[0].enabled and speckle[0].local_rates  # so the wash wants the context
    used, running = [0, 2, 3, 4], [(registry_step("hot_pixels"), None), (registry_step("speckle"), speckle)]
    contexts = []
    for folder in (None, tmp_path):
        later = staging._ContextLater.wanted(used, running, (90, 70), aside=False, folder=folder)
        for c in used:
            later.add(c, stack[c])
        later.start()
        contexts.append(later.result())
    on_heap, mapped = contexts
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "context-blocks.bin", "context-rates.bin", "modulation.bin", "tissue.bin", "zone.bin"]
    for got, heap in [(mapped.model.rates, on_heap.model.rates), (mapped.zone, on_heap.zone),
                      (mapped.modulation, on_heap.modulation), (mapped.tissue, on_heap.tissue)]:
        assert isinstance(got, np.memmap) and not isinstance(heap, np.memmap)
    for field in ("tissue", "modulation", "zone"):
        np.testing.assert_array_equal(getattr(mapped, field), getattr(on_heap, field))
    for field in ("tissue", "rates", "region_rates", "modulation"):
        np.testing.assert_array_equal(getattr(mapped.model, field), getattr(on_heap.model, field))


def test_steps_leave_their_own_fraction_to_the_wash_rows_only_inside_the_block():
    """Inside ``fractions_from_sums`` a plane step called on this thread leaves its
    ``removed_fraction`` None (a wash's rows take it from their own sums: the staged rows equal
    the in-memory wash's, tested above); outside, and after the block, it is the fraction of the
    removed map's sum over the plane's (numpy's float64 sums, the reference)."""
    from plexwash.qc.steps.hot_pixels import HotPixelSettings, hot_pixels_stack
    from plexwash.qc.steps.lifting import fractions_from_sums

    rng = np.random.default_rng(3)
    stack = rng.poisson(2.0, (1, 30, 40)).astype(np.float32)
    stack[0, 10, 12] = 900.0
    with fractions_from_sums():
        inside = hot_pixels_stack(stack, HotPixelSettings())
    outside = hot_pixels_stack(stack, HotPixelSettings())
    assert inside.stats[0]["removed_fraction"] is None
    expected = float(outside.removed.sum(dtype=np.float64)) / float(stack.sum(dtype=np.float64))
    assert outside.stats[0]["removed_fraction"] == expected > 0
    np.testing.assert_array_equal(inside.image, outside.image)
    assert inside.stats[0]["n_pixels"] == outside.stats[0]["n_pixels"] == 1
