"""Studio plain functions, without a viewer: reader, writer, sample data, contrast, flags,
one-channel wash previews, recipe edits, spillover edits, cancellable calls."""

from __future__ import annotations

import dataclasses
import threading
import time

import numpy as np
import pytest
import tifffile
from plexwash.plugin import _layers, _reader, _sample_data, _writer
from plexwash.plugin._cohort import read_quality_table, summarize_flags
from plexwash.plugin._run import CancellableCall, Cancelled
from plexwash.plugin._speckle import PreviewEngine, recipe_apply_to_all, recipe_reset_channel
from plexwash.qc import default_recipe, read_roi
from plexwash.qc.errors import InputError
from plexwash.qc.io import write_ome_tiff, write_ome_zarr


@pytest.fixture(scope="module")
def demo_roi(demo_dir):
    return _reader.read_with_stains(demo_dir / "cohort" / "roi_01.ome.tiff")


# --------------------------------------------------------------------------- contrast, names


def test_robust_limits_are_numpy_percentiles():
    rng = np.random.default_rng(3)
    image = rng.gamma(2.0, 10.0, size=(300, 200))
    lo, hi = _layers.robust_limits(image, low=1.0, high=99.0)
    # reference: numpy.percentile on every pixel (300 x 200 is below the subsample size)
    assert (lo, hi) == tuple(np.percentile(image, [1.0, 99.0]))


def test_robust_limits_subsample_big_images_and_never_collapse():
    rng = np.random.default_rng(4)
    image = rng.poisson(5.0, size=(1200, 1100)).astype(np.float32)
    lo, hi = _layers.robust_limits(image)
    exact = np.percentile(image, [0.5, 99.8])
    assert abs(lo - exact[0]) <= 1 and abs(hi - exact[1]) <= 1
    sparse = np.zeros((50, 50), np.float32)
    sparse[3, 3] = 7.0
    assert _layers.robust_limits(sparse) == (0.0, 7.0)  # high percentile is 0: use the max
    with pytest.raises(ValueError):
        _layers.robust_limits(image, low=60, high=40)


def test_grid_tiles_are_block_means_that_keep_the_channel_size():
    rng = np.random.default_rng(5)
    image = rng.poisson(3.0, size=(103, 98)).astype(np.uint16)
    tile = _layers.block_mean(image, 4)
    assert tile.shape == (26, 25) and tile.dtype == np.float32
    # reference: skimage.transform.downscale_local_mean (block mean), edges padded by repetition
    from skimage.transform import downscale_local_mean

    padded = np.pad(image.astype(np.float64), ((0, 1), (0, 2)), mode="edge")
    np.testing.assert_allclose(tile, downscale_local_mean(padded, (4, 4)), rtol=1e-6)
    assert _layers.block_mean(image, 1).shape == image.shape
    # 36 channels of 1000 px tile about one 1600 px screen across: 6 columns of 250 px
    assert _layers.tile_factor(36, (1000, 1000)) == 4 and _layers.tile_factor(22, (320, 320)) == 1
    # a tile of block size 4 (pixel 0.5 um) starts where the channel starts: centre of block 0 at 1.5 px
    assert _layers.tile_offset(4, (0.5, 0.5)) == (0.75, 0.75)


def test_palette_hues_are_distinct_and_cycle():
    tops = [tuple(np.round(_layers.colormap_for(i).colors[-1], 3)) for i in range(len(_layers.PALETTE))]
    assert len(set(tops)) == len(_layers.PALETTE)
    assert _layers.colormap_for(len(_layers.PALETTE)).name == _layers.colormap_for(0).name
    assert all(np.allclose(_layers.colormap_for(i).colors[0], [0, 0, 0, 1]) for i in range(3))


def test_find_stains_beside_then_one_folder_up(tmp_path):
    (tmp_path / "cohort").mkdir()
    roi = tmp_path / "cohort" / "a.tiff"
    assert _layers.find_stains(roi) is None
    (tmp_path / "stains.csv").write_text("tag,marker,wash\n")
    assert _layers.find_stains(roi) == tmp_path / "stains.csv"
    (tmp_path / "cohort" / "stains.csv").write_text("tag,marker,wash\n")
    assert _layers.find_stains(roi) == tmp_path / "cohort" / "stains.csv"


# --------------------------------------------------------------------------- reader


def _stains(folder, rows):
    text = "tag,marker,wash\n" + "".join(f"{c},{label},{u}\n" for c, label, u in rows)
    (folder / "stains.csv").write_text(text)


def test_reader_gives_one_layer_per_channel_named_by_label(tmp_path, small_stack):
    path = tmp_path / "roi.ome.tiff"
    write_ome_tiff(path, small_stack, ["Nd145", "Nd146", "Ir191"])
    _stains(tmp_path, [("Nd145", "CD3", "yes"), ("Nd146", "CD8", "yes"), ("Ir191", "DNA", "no")])
    reader = _reader.napari_get_reader(str(path))
    assert callable(reader)
    layers = reader(str(path))
    assert [kw["name"] for _, kw, kind in layers] == ["CD3", "CD8", "DNA"]
    assert all(kind == "image" for _, _, kind in layers)
    for i, (data, kw, _) in enumerate(layers):
        np.testing.assert_array_equal(np.asarray(data), small_stack[i])
        assert kw["metadata"]["plexwash"]["channel"] == ["Nd145", "Nd146", "Ir191"][i]
        assert kw["blending"] == "additive"
        assert kw["contrast_limits"][0] < kw["contrast_limits"][1]


def test_reader_plain_tiff_needs_a_stain_sheet(tmp_path, small_stack):
    path = tmp_path / "plain.tiff"
    tifffile.imwrite(path, small_stack, photometric="minisblack")
    assert _reader.napari_get_reader(str(path)) is None  # no names: not ours to read
    _stains(tmp_path, [("A1", "alpha", "yes"), ("B2", "beta", "yes"), ("C3", "gamma", "yes")])
    layers = _reader.napari_get_reader(str(path))(str(path))
    assert [kw["name"] for _, kw, _ in layers] == ["alpha", "beta", "gamma"]
    np.testing.assert_array_equal(np.asarray(layers[2][0]), small_stack[2])


def test_reader_ome_zarr_and_refusals(tmp_path, small_stack):
    path = tmp_path / "roi.ome.zarr"
    write_ome_zarr(path, small_stack, ["Nd145", "Nd146", "Ir191"])
    layers = _reader.napari_get_reader(str(path))(str(path))
    assert [kw["name"] for _, kw, _ in layers] == ["Nd145", "Nd146", "Ir191"]
    np.testing.assert_array_equal(np.asarray(layers[1][0]), small_stack[1])
    assert _reader.napari_get_reader(str(tmp_path / "notes.txt")) is None
    assert _reader.napari_get_reader(str(tmp_path / "missing.ome.tiff")) is None
    assert _reader.napari_get_reader([str(path), str(path)]) is None


def test_reader_ignores_a_stain_sheet_of_other_files_for_ome(tmp_path, small_stack):
    path = tmp_path / "roi.ome.tiff"
    write_ome_tiff(path, small_stack, ["Nd145", "Nd146", "Ir191"])
    _stains(tmp_path, [("X1", "x", "yes")])
    assert [kw["name"] for _, kw, _ in _reader.read_roi_layers(path)] == ["Nd145", "Nd146", "Ir191"]


# --------------------------------------------------------------------------- writer


def test_writer_round_trip_ome_tiff_and_zarr(tmp_path, small_roi):
    layers = _reader.read_roi_layers(small_roi)
    roi = read_roi(small_roi)
    for name in ("washed.ome.tiff", "washed.ome.zarr"):
        written = _writer.write_washed_stack(str(tmp_path / name), layers)
        back = read_roi(written[0])
        assert back.channels == roi.channels  # acquisition names, not labels
        np.testing.assert_array_equal(np.asarray(back.data), roi.data)
        assert back.pixel_size == pytest.approx((0.5, 0.5))


def test_writer_adds_suffix_and_refuses_mixed_shapes(tmp_path):
    a = (np.ones((8, 8), np.float32), {"name": "A"}, "image")
    b = (np.zeros((8, 8), np.float32), {"name": "B"}, "image")
    out = _writer.write_washed_stack(str(tmp_path / "stack"), [a, b])
    assert out[0].endswith("stack.ome.tiff")
    assert read_roi(out[0]).channels == ("A", "B")
    c = (np.zeros((4, 8), np.float32), {"name": "C"}, "image")
    with pytest.raises(ValueError, match="differ in shape"):
        _writer.stack_from_layers([a, c])


# --------------------------------------------------------------------------- sample data


def test_sample_data_is_the_demo_cohort(demo_dir):
    layers = _sample_data.demo_first_roi()
    roi = read_roi(demo_dir / "cohort" / "roi_01.ome.tiff", stains=demo_dir / "stains.csv")
    assert [kw["name"] for _, kw, _ in layers] == list(roi.labels)
    np.testing.assert_array_equal(np.asarray(layers[5][0]), roi.data[5])
    assert _sample_data.demo_second_roi()[0][1]["metadata"]["plexwash"]["roi"].endswith("roi_02.ome.tiff")


def test_sample_data_missing_demo_is_an_input_error(tmp_path, monkeypatch):
    monkeypatch.setenv(_sample_data.DEMO_ENV, str(tmp_path))
    with pytest.raises(InputError, match="demo cohort not found"):
        _sample_data.demo_first_roi()


# --------------------------------------------------------------------------- flags


def test_summarize_flags_separates_roi_and_channel_flags():
    rows = [{"channel": c, "label": c.lower(), "flags": f} for c, f in
            [("A", ["empty", "striped"]), ("B", ["low-sbr", "striped"]), ("C", ["striped"]),
             ("D", ["low-sbr", "striped"]), ("E", ["low-sbr", "striped"]), ("F", ["low-sbr", "striped"])]]
    assert summarize_flags(rows) == "striped · empty: a · low-sbr: b, d, e +1"
    assert summarize_flags([]) == ""


def test_read_quality_table_groups_by_roi_and_stage(tmp_path):
    (tmp_path / "quality.csv").write_text(
        "roi,channel,label,stage,sbr,snr,flags\n"
        "r1,A,a,raw,2.0,1.0,empty;low-sbr\n"
        "r1,A,a,washed,3.0,2.0,\n"
        "r2,A,a,raw,9.0,5.0,\n")
    table = read_quality_table(tmp_path / "quality.csv")
    assert set(table) == {"r1", "r2"}
    assert table["r1"]["raw"][0]["flags"] == ["empty", "low-sbr"]
    assert table["r1"]["washed"][0]["flags"] == []


# --------------------------------------------------------------------------- previews


def test_preview_equals_the_wash_channel_by_channel(demo_roi):
    from plexwash.qc.wash import wash

    roi = demo_roi
    recipe = default_recipe().with_channel("speckle", roi.channels[3], radius=3, min_area=3)
    washed = wash(roi, recipe)  # no spillover: compensation is skipped in both
    engine = PreviewEngine()
    for index in (0, 3):
        preview = engine.compute(roi, recipe, roi.channels[index])
        np.testing.assert_array_equal(preview.washed, washed.data[index])
        raw = roi.data[index].astype(np.float32)
        np.testing.assert_array_equal(preview.removed, raw - washed.data[index])
        assert preview.total_fraction == pytest.approx(
            float((raw - washed.data[index]).sum()) / float(raw.sum()))
        for step in ("hot_pixels", "speckle"):
            assert preview.fractions[step] == pytest.approx(washed.stats[step][index]["removed_fraction"])


def test_preview_with_spillover_equals_the_wash(demo_roi, demo_dir):
    from plexwash.qc.spillover import read_spillover
    from plexwash.qc.wash import wash

    matrix = read_spillover(demo_dir / "truth" / "spillover.csv")
    recipe = default_recipe().with_channel("speckle", demo_roi.channels[4], alpha=0.05)
    washed = wash(demo_roi, recipe, spillover=matrix)
    engine = PreviewEngine()
    for index in (4, 9):
        preview = engine.compute(demo_roi, recipe, demo_roi.channels[index], spillover=matrix)
        np.testing.assert_array_equal(preview.washed, washed.data[index])
        for step in ("hot_pixels", "compensation", "speckle"):
            assert preview.fractions[step] == pytest.approx(washed.stats[step][index]["removed_fraction"],
                                                            rel=1e-6, abs=1e-12)
    changed = recipe.with_channel("speckle", demo_roi.channels[9], radius=3)
    preview = engine.compute(demo_roi, changed, demo_roi.channels[9], spillover=matrix)
    assert engine.cache.reused == ("hot_pixels", "compensation")  # a speckle change keeps the compensated stack
    np.testing.assert_array_equal(preview.washed, wash(demo_roi, changed, spillover=matrix).data[9])


def test_preview_reuses_hot_pixels_while_only_speckle_changes(demo_roi):
    roi = demo_roi
    engine = PreviewEngine()
    recipe = default_recipe()
    engine.compute(roi, recipe, roi.channels[2])
    assert engine.cache.reused == ()
    engine.compute(roi, recipe.with_channel("speckle", roi.channels[2], radius=4), roi.channels[2])
    assert engine.cache.reused == ("hot_pixels",)
    engine.compute(roi, recipe.with_channel("hot_pixels", roi.channels[2], ratio=8.0), roi.channels[2])
    assert engine.cache.reused == ()


def test_lazy_rois_give_the_same_layers_and_previews(small_stack, tmp_path):
    import dask.array as da
    from plexwash.qc.io import Roi

    eager = Roi(small_stack, ("A", "B", "C"), tmp_path / "x.ome.tiff")
    lazy = Roi(da.from_array(small_stack, chunks=(1, 32, 24)), ("A", "B", "C"), tmp_path / "x.ome.tiff")
    for (d1, k1, _), (d2, k2, _) in zip(_layers.roi_layer_data(eager), _layers.roi_layer_data(lazy), strict=True):
        assert k1["contrast_limits"] == k2["contrast_limits"]
        np.testing.assert_array_equal(np.asarray(d1), np.asarray(d2))
    a = PreviewEngine().compute(eager, default_recipe(), "B")
    b = PreviewEngine().compute(lazy, default_recipe(), "B")
    np.testing.assert_array_equal(a.washed, b.washed)


def test_preview_of_a_pass_through_channel(small_stack, tmp_path):
    from plexwash.qc.io import Roi

    roi = Roi(small_stack, ("A", "B", "C"), tmp_path / "x.ome.tiff", use=(True, False, True))
    preview = PreviewEngine().compute(roi, default_recipe(), "B")
    np.testing.assert_array_equal(preview.washed, small_stack[1])
    assert preview.total_fraction == 0.0 and preview.notes


def test_apply_to_all_and_reset_channel():
    recipe = (default_recipe().with_channel("speckle", "A", radius=5)
              .with_channel("hot_pixels", "A", ratio=9.0).with_channel("speckle", "B", alpha=0.05))
    everywhere = recipe_apply_to_all(recipe, "A")
    assert everywhere.speckle.radius == 5 and everywhere.hot_pixels.ratio == 9.0
    assert everywhere.for_channel("speckle", "B").alpha == default_recipe().speckle.alpha
    assert "speckle" not in everywhere.overrides
    reset = recipe_reset_channel(recipe, "A")
    assert reset.for_channel("speckle", "A") == default_recipe().speckle
    assert reset.for_channel("speckle", "B").alpha == 0.05


# --------------------------------------------------------------------------- spillover edits


def test_edit_entry_and_heatmap_values():
    from plexwash.plugin._spillover import edit_entry, heatmap_values
    from plexwash.qc.spillover import SpilloverMatrix

    values = np.array([[1.0, 0.01, 0.0], [0.0, 1.0, 0.02], [0.005, 0.0, 1.0]])
    matrix = SpilloverMatrix(("A", "B", "C"), values, values * 0.5, values * 1.5)
    edited = edit_entry(matrix, "A", "C", 0.03)
    assert edited.values[0, 2] == 0.03 and edited.low[0, 2] == 0.03 and edited.high[0, 2] == 0.03
    assert matrix.values[0, 2] == 0.0  # the input is not modified
    shown = heatmap_values(edited)
    assert np.isnan(np.diag(shown)).all() and shown[1, 2] == pytest.approx(2.0)
    width = heatmap_values(edited, "interval width %")
    assert width[0, 1] == pytest.approx(1.0) and width[0, 2] == 0.0
    for bad in (("A", "A", 0.1), ("A", "Z", 0.1), ("A", "B", 1.5)):
        with pytest.raises(InputError):
            edit_entry(matrix, *bad)


EDIT_VALUES = np.array([[1.0, 0.01, 0.0], [0.0, 1.0, 0.02], [0.005, 0.0, 1.0]])


@pytest.mark.parametrize(
    ("edits", "problem"),
    [
        ([("A", "B", -0.01)], "off-diagonal entries must be in [0, 1)"),
        ([("A", "B", 1.0)], "off-diagonal entries must be in [0, 1)"),  # 1 is not < 1
        ([("A", "A", 0.5)], "must be 1"),
        ([("A", "C", float("nan"))], "not a finite number"),
        # each edit alone is fine; together rows A and B are near copies (condition 1.9e3)
        ([("A", "B", 0.999), ("B", "A", 0.999)], "ill-conditioned"),
    ],
)
def test_edit_entry_refuses_what_the_engine_refuses_with_its_message(edits, problem):
    from plexwash.plugin._spillover import SPILLOVER_SOURCE, edit_entry
    from plexwash.qc.spillover import SpilloverMatrix, check_spillover, compensate

    matrix = SpilloverMatrix(("A", "B", "C"), EDIT_VALUES, EDIT_VALUES * 0.5, EDIT_VALUES * 1.5)
    *fine, (source, receiver, value) = edits
    for edit in fine:
        matrix = edit_entry(matrix, *edit)
    refused = np.array(matrix.values)
    refused[matrix.channels.index(source), matrix.channels.index(receiver)] = value
    refused = SpilloverMatrix(matrix.channels, refused)
    with pytest.raises(InputError) as engine:
        check_spillover(refused, source=SPILLOVER_SOURCE)
    with pytest.raises(InputError) as editor:
        edit_entry(matrix, source, receiver, value)
    assert str(editor.value) == str(engine.value)
    assert problem in str(editor.value)
    # and compensating with that matrix is refused for the same reason
    with pytest.raises(InputError) as used:
        compensate(np.ones((3, 4, 4), np.float32), refused)
    assert str(used.value).split(": ", 1)[1] == str(engine.value).split(": ", 1)[1]


# --------------------------------------------------------------------------- cancelling


def test_cancellable_call_interrupts_a_running_call():
    call = CancellableCall()
    result, started = {}, threading.Event()

    def busy():
        started.set()
        total = 0
        while True:  # Python bytecode: the interrupt lands within a few steps
            total += 1

    thread = threading.Thread(target=lambda: result.setdefault("value", call(busy)))
    thread.start()
    assert started.wait(5)
    time.sleep(0.05)
    assert call.cancel() is True
    thread.join(5)
    assert not thread.is_alive()
    assert isinstance(result["value"], Cancelled)
    assert call.cancel() is False  # at most once


def test_cancellable_call_returns_and_never_fires_later():
    call = CancellableCall()
    assert call(lambda x: x + 1, 1) == 2
    assert call.cancel() is False  # nothing runs: no interrupt is sent anywhere
    time.sleep(0.01)
    early = CancellableCall()
    early.cancel()
    assert isinstance(early(lambda: 1), Cancelled)


def test_preview_dataclass_is_frozen(small_stack, tmp_path):
    from plexwash.qc.io import Roi

    roi = Roi(small_stack, ("A", "B", "C"), tmp_path / "x.ome.tiff")
    preview = PreviewEngine().compute(roi, default_recipe(), "A")
    with pytest.raises(dataclasses.FrozenInstanceError):
        preview.channel = "B"


def test_launcher_refuses_a_bad_cohort_before_opening_a_window(tmp_path):
    from plexwash.plugin import launch_studio

    with pytest.raises(InputError, match="cohort folder not found"):
        launch_studio(tmp_path / "missing", show=False, run=False)
    with pytest.raises(InputError, match="no ROI found"):
        launch_studio(tmp_path, show=False, run=False)
