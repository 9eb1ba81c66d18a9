"""The studio's dock widgets driven in a real napari viewer under Xvfb.

Settings are changed programmatically, then the layers are checked against the engine's
own output for the same settings.
"""

from __future__ import annotations

import dataclasses
import hashlib
import threading

import numpy as np
import pytest
from plexwash.plugin import WIDGETS, launch_studio
from plexwash.plugin._cohort import summarize_flags
from plexwash.plugin._layers import grid_of, robust_limits, studio_layers
from plexwash.plugin._quality import measure_rows
from plexwash.plugin._reader import read_with_stains
from plexwash.plugin._run import Cancelled
from plexwash.qc import default_recipe, load_recipe
from plexwash.qc.io import list_cohort
from plexwash.qc.steps.speckle import SpeckleSettings

pytestmark = pytest.mark.gui

WAIT_MS = 120_000  # generous: the test machine is shared


#: A small stains of the demo generator: neighbouring Nd masses (spillover pairs), a failed
#: stain (Tb159) and DNA, so widget tests stay quick (napari adds about 4 layers a second here).
SMALL_STAINS = ("Nd142", "Nd143", "Nd144", "Nd146", "Gd158", "Tb159", "Gd160", "Ir191")


@pytest.fixture(scope="module")
def cohort(tmp_path_factory, generator):
    """Two unseen ROIs of the demo generator (8 channels, about 96 px a side) + controls."""
    root = tmp_path_factory.mktemp("studio")
    stains = [m for m in generator.default_stains() if m.channel in SMALL_STAINS]
    generator.simulate_cohort(root, random_state=23, n_rois=2, size=96, control_size=64, stains=stains)
    return root


def dock(viewer, title):
    _, widget = viewer.window.add_plugin_dock_widget("plexwash", title)
    return widget


def wait(qtbot, worker):
    """Wait for a napari worker to finish (its result handlers have run by then)."""
    assert worker is not None
    # a flag set by a slot connected before the worker started: a worker that finishes
    # before this call (a run cancelled at once) would make waitSignal miss its signal
    qtbot.waitUntil(lambda: getattr(worker, "finished_handled", False), timeout=WAIT_MS)


def open_first_roi(qtbot, viewer, cohort):
    widget = dock(viewer, "Cohort")
    wait(qtbot, widget.open_cohort(cohort / "cohort"))
    wait(qtbot, widget.load(0))
    return widget


def wait_preview(qtbot, speckle):
    qtbot.waitUntil(lambda: speckle.last is not None and speckle.runner.idle, timeout=WAIT_MS)


# --------------------------------------------------------------------------- Cohort


def test_cohort_lists_flags_loads_and_views(make_napari_viewer, qtbot, cohort):
    viewer = make_napari_viewer()
    widget = open_first_roi(qtbot, viewer, cohort)
    paths = list_cohort(cohort / "cohort")
    assert widget.table.rowCount() == len(paths) == 2
    for row, path in enumerate(paths):  # flags are the engine's quality of the raw ROI
        expected = summarize_flags(measure_rows(read_with_stains(path), default_recipe()))
        assert widget.table.item(row, 1).text() == expected

    roi = read_with_stains(paths[0])
    raw = studio_layers(viewer, stage="raw")
    assert [layer.name for layer in raw] == list(roi.labels)
    for i, layer in enumerate(raw):
        np.testing.assert_array_equal(layer.data, roi.data[i])
        assert tuple(layer.contrast_limits) == pytest.approx(robust_limits(roi.data[i]))
        assert layer.blending == "additive"

    widget.set_view("grid")
    # tiled side by side, each framed and labelled, in one picture (one texture, not one layer per
    # channel); the channel layers themselves stay full size and hidden until the one view
    assert not any(layer.visible for layer in raw)
    picture = viewer.layers["plexwash grid"]
    assert picture.visible and picture.rgb
    labels = viewer.layers["plexwash grid labels"]  # the grid's own labels layer, filled on load
    assert labels.visible and list(labels.features["label"]) == list(roi.labels)
    assert not viewer.layers["plexwash labels"].visible
    boxes = [np.asarray(box) for box in labels.data]
    assert len({tuple(box[0]) for box in boxes}) == len(raw)
    for box, layer, colour in zip(boxes, raw, (layer.colormap.colors[-1][:3] for layer in raw), strict=True):
        # each tile, in the picture's pixels: the channel scaled by its contrast, in its hue (this
        # cohort is small enough for full-size tiles); a colormap black -> hue is linear (napari)
        (y0, x0) = (int(round(v)) for v in box[0] / np.asarray(picture.scale))
        n_y, n_x = layer.data.shape
        tile = picture.data[y0:y0 + n_y, x0:x0 + n_x].astype(float)
        lo, hi = layer.contrast_limits
        level = np.clip((np.asarray(layer.data, float) - lo) / (hi - lo), 0, 1)
        np.testing.assert_allclose(tile, 255 * level[..., None] * np.asarray(colour)[None, None], atol=0.51)
    widget.look.setCurrentText("grey")
    grey = viewer.layers["plexwash grid"].data
    assert np.array_equal(grey[..., 0], grey[..., 1]) and np.array_equal(grey[..., 1], grey[..., 2])
    assert grey.max() > 0
    widget.look.setCurrentText("hues")
    chosen = [roi.channels[1], roi.channels[4], roi.channels[6]]
    widget.set_ticked(chosen)
    widget.set_view("overlay")
    assert not grid_of(viewer).enabled
    shown = [layer for layer in raw if layer.visible]
    assert [layer.metadata["plexwash"]["channel"] for layer in shown] == chosen
    assert not labels.visible and {tuple(layer.translate) for layer in shown} == {(0.0, 0.0)}
    assert len({tuple(layer.colormap.colors[-1]) for layer in shown}) == 3  # distinct hues
    widget.channels.setCurrentRow(4)
    widget.set_view("single")
    assert [layer.name for layer in raw if layer.visible] == [roi.labels[4]]

    widget.low.setValue(5.0)
    widget.high.setValue(95.0)
    widget.rescale()
    assert tuple(raw[3].contrast_limits) == pytest.approx(robust_limits(roi.data[3], low=5, high=95))


def test_roi_switches_keep_the_layers_and_swap_their_data(make_napari_viewer, qtbot, cohort):
    """ROIs of a cohort share their channels: a switch keeps every layer (the same objects,
    the preview's two layers included) and swaps their data; nothing is removed while the
    canvas draws (removing layers there crashed the studio with the live preview on)."""
    viewer = make_napari_viewer(show=True)
    speckle = dock(viewer, "Speckle")
    widget = open_first_roi(qtbot, viewer, cohort)
    wait_preview(qtbot, speckle)
    widget.set_view("preview")
    wait_preview(qtbot, speckle)
    before = list(viewer.layers)
    assert "plexwash labels" in viewer.layers
    assert len(studio_layers(viewer, stage="washed")) == len(studio_layers(viewer, stage="removed")) == 1
    removed = []
    viewer.layers.events.removed.connect(lambda event: removed.append(event.value))
    paths = list_cohort(cohort / "cohort")
    for row in (1, 0, 1):
        speckle.last = None
        wait(qtbot, widget.load(row))
        wait_preview(qtbot, speckle)
        roi = read_with_stains(paths[row])
        assert list(viewer.layers) == before and not removed
        for i, layer in enumerate(studio_layers(viewer, stage="raw")):
            np.testing.assert_array_equal(layer.data, roi.data[i])
            assert layer.metadata["plexwash"]["roi"] == str(paths[row])
            assert tuple(layer.contrast_limits) == pytest.approx(robust_limits(roi.data[i]))
        (washed,) = studio_layers(viewer, stage="washed")
        assert washed.metadata["plexwash"]["roi"] == str(paths[row]) and washed.visible
        shown = [layer for layer in viewer.layers if layer.visible]
        assert [layer.name for layer in shown] == [roi.labels[0], f"{roi.labels[0]} · washed",
                                                   f"{roi.labels[0]} · removed", "plexwash labels"]
        assert len({tuple(layer.translate) for layer in shown[:3]}) == 3  # side by side
        assert list(viewer.layers["plexwash labels"].features["label"]) == [
            f"{roi.labels[0]} · raw", f"{roi.labels[0]} · washed", f"{roi.labels[0]} · removed"]


def test_cohort_refuses_a_folder_without_rois(make_napari_viewer, tmp_path):
    viewer = make_napari_viewer()
    widget = dock(viewer, "Cohort")
    assert widget.open_cohort(tmp_path) is None
    assert "no ROI found" in widget.status.text()


# --------------------------------------------------------------------------- Quality


def test_quality_table_is_the_engine_table_sortable(make_napari_viewer, qtbot, cohort):
    viewer = make_napari_viewer()
    quality = dock(viewer, "Quality")
    open_first_roi(qtbot, viewer, cohort)
    roi = read_with_stains(list_cohort(cohort / "cohort")[0])
    expected = measure_rows(roi, default_recipe())
    qtbot.waitUntil(lambda: len(quality.rows) == len(expected), timeout=WAIT_MS)
    assert [r["sbr"] for r in quality.rows] == [r["sbr"] for r in expected]
    assert [r["flags"] for r in quality.rows] == [r["flags"] for r in expected]
    assert quality.table.rowCount() == len(expected)
    # one bar per channel (the plot is drawn in the next turn of the event loop)
    qtbot.waitUntil(lambda: len(quality.figure.axes[0].patches) == len(expected), timeout=WAIT_MS)

    from plexwash.plugin._quality import COLUMNS
    from qtpy.QtCore import Qt

    keys = [c[0] for c in COLUMNS]
    channel_column, sbr_column = keys.index("channel"), keys.index("sbr")
    assert keys.index("flags") < sbr_column  # the flags are not pushed off a narrow dock
    # stains order first, as the plot
    assert [quality.table.item(r, channel_column).text() for r in range(len(expected))] == list(roi.channels)
    quality.table.sortItems(sbr_column, Qt.SortOrder.DescendingOrder)
    top = max(expected, key=lambda r: r["sbr"])
    assert quality.table.item(0, channel_column).text() == top["channel"]
    quality.table.selectRow(0)
    assert quality.state.channel == top["channel"]

    from plexwash.qc.wash import compute, wash

    quality.stage.setCurrentIndex(1)  # washed with the studio's recipe
    wait(qtbot, quality.measure())
    washed = compute(wash(roi, quality.state.recipe))
    expected = measure_rows(roi, quality.state.recipe, stage="washed", data=washed.data)
    assert [r["stage"] for r in quality.rows] == ["washed"] * len(expected)
    assert [r["sbr"] for r in quality.rows] == [r["sbr"] for r in expected]


# --------------------------------------------------------------------------- Speckle


def test_speckle_preview_equals_the_engine(make_napari_viewer, qtbot, cohort, tmp_path):
    from plexwash.qc import remove_hot_pixels
    from plexwash.qc.background_context import roi_background
    from plexwash.qc.steps.speckle import speckle_stack
    from plexwash.qc.wash import wash

    viewer = make_napari_viewer()
    speckle = dock(viewer, "Speckle")
    open_first_roi(qtbot, viewer, cohort)
    wait_preview(qtbot, speckle)
    roi = speckle.state.roi
    channel = roi.channels[5]
    speckle.channel.setCurrentIndex(5)
    wait_preview(qtbot, speckle)

    with qtbot.waitSignal(speckle.runner.delivered, timeout=WAIT_MS):
        speckle.forms["speckle"].editors["radius"].setValue(4)
    raw = roi.data[5].astype(np.float32)
    hot = remove_hot_pixels(raw, ratio=5.0, min_excess=10.0)
    used = [i for i, u in enumerate(roi.use) if u]  # speckle tests against the ROI's background context
    context = roi_background(lambda i: np.asarray(roi.data[i], np.float32), used, raw.shape)
    expected = speckle_stack(hot.image[None], SpeckleSettings(radius=4), context=context)
    expected = expected._replace(image=expected.image[0])
    washed_layer = viewer.layers[f"{roi.labels[5]} · washed"]
    removed_layer = viewer.layers[f"{roi.labels[5]} · removed"]
    np.testing.assert_array_equal(washed_layer.data, expected.image)
    np.testing.assert_array_equal(removed_layer.data, raw - expected.image)
    whole = wash(roi, speckle.state.recipe)  # the cohort wash with the same recipe
    np.testing.assert_array_equal(washed_layer.data, whole.data[5])
    total = float((raw - expected.image).sum()) / float(raw.sum())
    assert speckle.removed_text.text() == f"removed {100 * total:.3g} % of the signal"
    assert speckle.state.recipe.for_channel("speckle", channel).radius == 4
    assert speckle.state.recipe.speckle.radius == 2  # only this channel changed

    # a burst of changes: only the newest setting reaches the canvas
    for value in (5, 6, 7):
        speckle.forms["speckle"].editors["radius"].setValue(value)
    wait_preview(qtbot, speckle)
    latest = speckle_stack(hot.image[None], SpeckleSettings(radius=7), context=context).image[0]
    np.testing.assert_array_equal(washed_layer.data, latest)

    label = speckle.forms["speckle"].layout().labelForField(speckle.forms["speckle"].editors["radius"])
    assert "bold" in label.styleSheet() and "own speckle radius" in speckle.status.text()
    assert speckle.apply_to_all(ask=False)
    wait_preview(qtbot, speckle)
    assert "bold" not in label.styleSheet()
    assert speckle.state.recipe.speckle.radius == 7 and not speckle.state.recipe.overrides
    mine = tmp_path / "mine.toml"  # a file plexwash did not write is never replaced
    mine.write_text("# my notes\n")
    assert speckle.save_recipe(mine) is None and speckle.status.text().startswith(f"error: {mine}")
    assert mine.read_text() == "# my notes\n"
    saved = speckle.save_recipe(tmp_path / "tuned")
    assert saved.name == "tuned.toml"
    assert load_recipe(saved).sha256() == speckle.state.recipe.sha256()


def test_speckle_preview_is_the_wash_for_non_default_recipes(make_napari_viewer, qtbot, cohort):
    """Every setting of every step moved, per-channel overrides, a spillover matrix: the
    preview layers equal the full wash (the preview once dropped hot_pixels.flat_sigmas)."""
    from plexwash.qc.spillover import estimate_from_controls
    from plexwash.qc.wash import wash

    viewer = make_napari_viewer()
    speckle = dock(viewer, "Speckle")
    # the Preview view: its layers get each new preview (hidden ones wait until it is shown)
    open_first_roi(qtbot, viewer, cohort).set_view("preview")
    wait_preview(qtbot, speckle)
    roi = speckle.state.roi
    matrix = estimate_from_controls(cohort / "controls" / "controls.csv")
    rng = np.random.default_rng(11)
    for round_ in range(2):
        recipe = (speckle.state.recipe
                  .replace("hot_pixels", ratio=float(rng.uniform(2, 4)), min_excess=float(rng.uniform(2, 6)),
                           flat_sigmas=float(rng.uniform(2, 4)))
                  .replace("compensation", method=("linear", "nnls")[round_])
                  .replace("speckle", threshold=0.3, radius=3, alpha=0.05, value_alpha=1e-7, keep_touching=True,
                           min_area=3)
                  .with_channel("hot_pixels", roi.channels[1], flat_sigmas=0.0)
                  .with_channel("speckle", roi.channels[2], radius=1, min_area=1))
        with qtbot.waitSignal(speckle.runner.delivered, timeout=WAIT_MS):
            speckle.state.set_spillover(matrix if round_ else None)
            speckle.state.set_recipe(recipe)
        wait_preview(qtbot, speckle)
        whole = wash(roi, recipe, spillover=matrix if round_ else None)
        for index in (1, 2, 4):
            speckle.channel.setCurrentIndex(index)
            wait_preview(qtbot, speckle)
            label = roi.labels[index]
            raw = np.asarray(roi.data[index], dtype=np.float32)
            np.testing.assert_array_equal(viewer.layers[f"{label} · washed"].data, whole.data[index])
            np.testing.assert_array_equal(viewer.layers[f"{label} · removed"].data, raw - whole.data[index])


def test_speckle_rejects_out_of_range_values(make_napari_viewer, qtbot, cohort):
    viewer = make_napari_viewer()
    speckle = dock(viewer, "Speckle")
    open_first_roi(qtbot, viewer, cohort)
    editor = speckle.forms["speckle"].editors["radius"]
    meta = {f.name: f.metadata for f in dataclasses.fields(SpeckleSettings)}["radius"]
    assert (editor.minimum(), editor.maximum()) == (meta["low"], meta["high"])
    alpha = speckle.forms["speckle"].editors["alpha"]
    assert alpha.minimum() > 0  # open lower bound: 0 cannot be typed in


# --------------------------------------------------------------------------- Spillover


def test_spillover_load_edit_preview_save(make_napari_viewer, qtbot, cohort, tmp_path):
    from plexwash.plugin._spillover import compensated_stack, heatmap_values
    from plexwash.qc.errors import InputError
    from plexwash.qc.spillover import (
        SpilloverMatrix,
        align_spillover,
        check_spillover,
        compensate,
        read_spillover,
    )

    viewer = make_napari_viewer()
    spill = dock(viewer, "Spillover")
    open_first_roi(qtbot, viewer, cohort)
    spill.load(cohort / "truth" / "spillover.csv")
    truth = read_spillover(cohort / "truth" / "spillover.csv")
    np.testing.assert_array_equal(spill.state.spillover.values, truth.values)
    shown = spill.figure.axes[0].images[0].get_array()
    np.testing.assert_allclose(np.ma.filled(shown, np.nan), heatmap_values(truth), equal_nan=True)

    names = list(truth.channels)
    spill.set_entry(names[0], names[1], 0.0123)
    assert spill.state.spillover.values[0, 1] == 0.0123
    # a value the engine refuses (off-diagonal entries must be < 1) is refused, in its words
    spill.set_entry(names[0], names[1], 1.0)
    assert spill.state.spillover.values[0, 1] == 0.0123
    refused = np.array(spill.state.spillover.values)
    refused[0, 1] = 1.0
    with pytest.raises(InputError) as engine:
        check_spillover(SpilloverMatrix(names, refused))
    assert spill.status.text() == f"error: {engine.value}"
    spill.source.setCurrentText(names[3])
    spill.receiver.setCurrentText(names[4])
    assert spill.value.value() == pytest.approx(100 * truth.values[3, 4])

    wait(qtbot, spill.preview())
    roi = spill.state.roi
    expected = compensate(roi.data.astype(np.float32),
                          align_spillover(spill.state.spillover, roi.channels), method="nnls")
    layers = studio_layers(viewer, stage="compensated")
    assert len(layers) == 1 and layers[0].visible  # one layer: the receiving channel, beside raw
    for receiver in (4, 0, 6):  # another receiver: the same layer, that channel's pixels
        spill.receiver.setCurrentText(names[receiver])
        (layer,) = studio_layers(viewer, stage="compensated")
        assert layer is layers[0] and layer.visible and layer.metadata["plexwash"]["channel"] == names[receiver]
        np.testing.assert_array_equal(layer.data, expected[layer.metadata["plexwash"]["index"]])
        shown = {(x.metadata["plexwash"]["channel"], x.metadata["plexwash"]["stage"])
                 for x in studio_layers(viewer) if x.visible}
        assert shown == {(names[receiver], "raw"), (names[receiver], "compensated")}
    spill.receiver.setCurrentText(names[4])
    used, stack = compensated_stack(roi, spill.state.spillover)
    np.testing.assert_array_equal(stack, expected)

    # never saved over a file the studio read: the loaded matrix, a control image, an ROI
    loaded = cohort / "truth" / "spillover.csv"
    before = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in (loaded, *spill.state.rois)}
    assert spill.save(loaded) is None and spill.status.text().startswith(f"error: {loaded}")
    assert spill.save(spill.state.rois[0]) is None  # an ROI, and not a .csv either
    assert {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in before} == before
    assert spill.save_path.path() != loaded  # the suggested name is not the input

    path = spill.save(tmp_path / "edited.csv")
    back = read_spillover(path)
    np.testing.assert_array_equal(back.values, spill.state.spillover.values)
    assert spill.state.recipe.compensation.spillover == str(path)


def test_spillover_estimate_from_controls_and_tissue(make_napari_viewer, qtbot, cohort):
    from plexwash.plugin._spillover import heatmap_values

    viewer = make_napari_viewer()
    spill = dock(viewer, "Spillover")
    dock(viewer, "Cohort").open_cohort(cohort / "cohort")
    controls = cohort / "controls" / "controls.csv"
    assert spill.controls_path.path() == controls  # found beside the cohort
    from plexwash.qc.spillover import estimate_from_controls

    wait(qtbot, spill.estimate_controls(controls))
    expected = estimate_from_controls(controls)
    np.testing.assert_array_equal(spill.state.spillover.values, expected.values)
    np.testing.assert_array_equal(spill.state.spillover.high, expected.high)

    from plexwash.qc.spillover import estimate_from_tissue

    wait(qtbot, spill.estimate_tissue())
    paths = list_cohort(cohort / "cohort")
    tissue = estimate_from_tissue(paths, stains=cohort / "stains.csv")
    np.testing.assert_array_equal(spill.state.spillover.values, tissue.values)
    spill.view.setCurrentText("interval width %")
    shown = np.ma.filled(spill.figure.axes[0].images[0].get_array(), np.nan)
    np.testing.assert_allclose(shown, heatmap_values(tissue, "interval width %"), equal_nan=True)


# --------------------------------------------------------------------------- Run


class BlockedWash:
    """A hook in place of ``run.wash_one``: the ROI number ``block`` (1-based) enters the hook
    and waits there, running Python (where the studio's cancel interrupt lands), until an
    interrupt ends it; every other ROI is washed as usual. Records what happened."""

    def __init__(self, real, block: int):
        self.real, self.block = real, block
        self.calls: list[str] = []
        self.interrupted: list[str] = []
        self.release = threading.Event()  # never set: only an interrupt ends the wait

    def __call__(self, job):
        self.calls.append(job.roi)
        if len(self.calls) == self.block:
            try:
                for _ in range(WAIT_MS // 10):  # bounded, so a broken cancel fails, not hangs
                    if self.release.wait(0.01):
                        break
            except KeyboardInterrupt:
                self.interrupted.append(job.roi)
                raise
        return self.real(job)


def test_run_washes_the_cohort_and_cancel_stops(make_napari_viewer, qtbot, cohort, tmp_path,
                                                monkeypatch):
    """Cancel while the first ROI is in flight: nothing is recorded; a rerun washes both."""
    import plexwash.qc.run.execute as run_module
    from plexwash.qc.run import read_ledger

    hook = BlockedWash(run_module.wash_one, block=1)
    monkeypatch.setattr(run_module, "wash_one", hook)
    monkeypatch.setattr(run_module, "pool_size", lambda jobs, cores: 0)  # the hook is in this process
    viewer = make_napari_viewer()
    cohort_widget = dock(viewer, "Cohort")
    run = dock(viewer, "Run")
    wait(qtbot, cohort_widget.open_cohort(cohort / "cohort"))
    assert run.cohort.path() == cohort / "cohort"

    out = tmp_path / "run"
    run.output.set_path(out)
    worker = run.run()
    assert not run.run_button.isEnabled() and run.cancel_button.isEnabled()
    qtbot.waitUntil(lambda: len(hook.calls) == 1, timeout=WAIT_MS)  # first ROI in flight
    run.cancel()
    wait(qtbot, worker)
    assert hook.interrupted == [hook.calls[0]] and len(hook.calls) == 1
    assert run.summary is None and "cancelled" in run.status.text()
    assert run.run_button.isEnabled() and not run.cancel_button.isEnabled()
    assert read_ledger(out) == []

    monkeypatch.setattr(run_module, "wash_one", hook.real)
    wait(qtbot, run.run())  # rerun: resumes, finishes
    assert run.summary is not None
    assert (run.summary.done, run.summary.skipped, run.summary.failed) == (2, 0, 0)
    for path in list_cohort(cohort / "cohort"):
        assert (out / path.name).is_file()
    assert cohort_widget.table.item(0, 2).text() not in ("—", "")  # washed flags arrived


def test_cancel_interrupts_a_run_between_rois(make_napari_viewer, qtbot, cohort, tmp_path, monkeypatch):
    """Cancel while the second ROI is in flight: the first stays done, the second is not
    recorded and leaves no temporary file; a rerun skips the first and washes the second."""
    import plexwash.qc.run.execute as run_module
    from plexwash.qc.run import read_ledger

    hook = BlockedWash(run_module.wash_one, block=2)
    monkeypatch.setattr(run_module, "wash_one", hook)
    monkeypatch.setattr(run_module, "pool_size", lambda jobs, cores: 0)  # the hook is in this process
    viewer = make_napari_viewer()
    run = dock(viewer, "Run")
    run.cohort.set_path(cohort / "cohort")
    out = tmp_path / "run"
    run.output.set_path(out)
    worker = run.run()
    qtbot.waitUntil(lambda: len(hook.calls) == 2, timeout=WAIT_MS)
    run.cancel()
    wait(qtbot, worker)
    # the blocked ROI was ended by the interrupt, not by its wait running out
    assert hook.interrupted == [hook.calls[1]] and not hook.release.is_set()
    assert "cancelled" in run.status.text() and run.summary is None
    records = read_ledger(out)
    assert [(r["roi"], r["status"]) for r in records] == [(hook.calls[0], "done")]
    assert not [p for p in out.iterdir() if ".partial-" in p.name or ".spill-" in p.name]

    monkeypatch.setattr(run_module, "wash_one", hook.real)
    wait(qtbot, run.run())
    assert (run.summary.done, run.summary.skipped, run.summary.failed) == (1, 1, 0)


def test_cancel_before_start_returns_cancelled():
    from plexwash.plugin._run import CancellableCall

    call = CancellableCall()
    call.cancel()
    assert isinstance(call(lambda: 1 / 0), Cancelled)


# --------------------------------------------------------------------------- launcher, look


def test_launcher_docks_five_widgets_and_lists_the_cohort(make_napari_viewer, qtbot, cohort):
    viewer = make_napari_viewer(show=True)
    launch_studio(cohort / "cohort", viewer=viewer, run=False)
    titles = [name.split(" (")[0] for name in viewer.window.dock_widgets]
    assert titles == list(WIDGETS)
    widgets = {name.split(" (")[0]: w for name, w in viewer.window.dock_widgets.items()}
    assert widgets["Cohort"].table.rowCount() == 2
    qtbot.waitUntil(lambda: widgets["Cohort"].state.roi is not None, timeout=WAIT_MS)
    speckle = widgets["Speckle"]
    wait_preview(qtbot, speckle)
    qtbot.wait(200)

    shot = viewer.screenshot(canvas_only=False)
    assert shot.ndim == 3 and shot.shape[0] > 400 and shot.shape[1] > 600
    assert shot[..., :3].std() > 10  # the window is drawn, not a flat colour
    canvas = viewer.screenshot(canvas_only=True)
    lit = (canvas[..., :3].max(axis=2) > 40).mean()
    assert 0.005 < lit < 0.9  # channels rendered on the black canvas
