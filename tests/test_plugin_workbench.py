"""A day's work in the studio: the Run widget's own progress, report and output folder, raw and
washed quality side by side, a readable heatmap, compensated layers added in one batch, the
tissue mask, and docks that scroll instead of squeezing their lists."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.plugin._reader import read_with_stains
from plexwash.qc.io import list_cohort

from . import test_plugin_widgets as widgets
from .test_plugin_widgets import WAIT_MS, dock, open_first_roi, wait

pytestmark = pytest.mark.gui

cohort = widgets.cohort  # the same small two-ROI cohort fixture


# --------------------------------------------------------------------------- plain functions


def test_heatmap_cells_and_labels_stay_readable_at_22_and_40_channels():
    from plexwash.plugin._spillover import heatmap_layout

    for n in (22, 40):
        for width in (300, 420, 900):
            box = heatmap_layout(n, width, 6)
            assert box["cell"] >= 12 and box["font"] >= 5.5  # a 5.5-point label fits a 12 px row
            # the figure is the grid plus its labels, no empty band below
            assert box["height"] == box["top"] + n * box["cell"] + box["bottom"]
    assert heatmap_layout(8, 900, 6)["cell"] == 24  # few channels: large cells, capped


def test_heatmap_zero_differs_from_the_figure_background():
    from matplotlib.colors import to_rgb
    from plexwash.plugin._spillover import DIAGONAL, FIGURE_BACKGROUND, HEATMAP_COLOURS

    zero, background, diagonal = (np.array(to_rgb(c)) for c in (HEATMAP_COLOURS[0], FIGURE_BACKGROUND, DIAGONAL))
    # a visible step: at least 10 % of full scale on some channel (common practice for UI contrast)
    assert np.abs(zero - background).max() > 0.1
    assert np.abs(zero - diagonal).max() > 0.1


def test_side_by_side_pairs_each_metric():
    from plexwash.plugin._quality import BOTH_COLUMNS, side_by_side

    raw = [{"channel": "A", "label": "a", "sbr": 2.0, "snr": 1.0, "flags": ["empty"]},
           {"channel": "B", "label": "b", "sbr": 5.0, "snr": 3.0, "flags": []}]
    washed = [{"channel": "B", "label": "b", "sbr": 6.0, "snr": 4.0, "flags": []},
              {"channel": "A", "label": "a", "sbr": 3.0, "snr": 2.0, "flags": []}]
    rows = side_by_side(raw, washed)
    assert [r["channel"] for r in rows] == ["A", "B"]  # the raw (stains) order
    assert (rows[0]["raw sbr"], rows[0]["washed sbr"]) == (2.0, 3.0)
    assert (rows[0]["raw flags"], rows[0]["washed flags"]) == (["empty"], [])
    keys = [c[0] for c in BOTH_COLUMNS]
    assert keys.index("raw flags") + 1 == keys.index("washed flags") < keys.index("raw sbr")


# --------------------------------------------------------------------------- Run


def test_run_widget_shows_progress_links_the_report_and_keeps_its_output(make_napari_viewer, qtbot, cohort,
                                                                         tmp_path, monkeypatch):
    viewer = make_napari_viewer()
    cohort_widget = dock(viewer, "Cohort")
    run = dock(viewer, "Run")
    wait(qtbot, cohort_widget.open_cohort(cohort / "cohort"))
    assert run.output.path() == cohort / "cohort_washed"  # suggested beside the cohort

    # the run may not write into its own cohort: the engine's guard says why
    run.output.set_path(cohort / "cohort")
    run.output.changed.emit(str(cohort / "cohort"))
    assert run.run() is None and run.status.text().startswith("error: ")
    assert not any(p.name == "ledger.jsonl" for p in (cohort / "cohort").iterdir())

    out = tmp_path / "chosen"
    run.output.set_path(out)
    run.output.changed.emit(str(out))  # as typing it does
    other = tmp_path / "other_cohort"
    other.mkdir()
    for path in list_cohort(cohort / "cohort"):
        (other / path.name).write_bytes(path.read_bytes())
    wait(qtbot, cohort_widget.open_cohort(other))
    assert run.cohort.path() == other and run.output.path() == out  # the user's choice stays

    opened = []
    from qtpy.QtGui import QDesktopServices

    monkeypatch.setattr(QDesktopServices, "openUrl", lambda url: opened.append(url.toLocalFile()) or True)
    assert not run.report_button.isEnabled()
    wait(qtbot, run.run())
    n = len(list_cohort(other))
    assert run.bar.maximum() == n and run.bar.value() == n
    assert run.progress_text.text().startswith(f"run finished: {n} done, 0 skipped, 0 failed")
    assert run.report_button.isEnabled() and (out / "report.html").is_file()
    run.report_button.click()
    assert opened == [str(out / "report.html")]


# --------------------------------------------------------------------------- Quality


def test_quality_shows_raw_and_washed_side_by_side(make_napari_viewer, qtbot, cohort):
    from plexwash.plugin._quality import SOURCES, measure_rows
    from plexwash.qc.wash import compute, wash

    viewer = make_napari_viewer()
    quality = dock(viewer, "Quality")
    open_first_roi(qtbot, viewer, cohort)
    roi = read_with_stains(list_cohort(cohort / "cohort")[0])
    quality.stage.setCurrentIndex(SOURCES.index(("both", "measure", SOURCES[4][2])))
    wait(qtbot, quality.measure())
    assert quality.shown == ("both", "measure")
    washed = compute(wash(roi, quality.state.recipe))
    raw_rows = measure_rows(roi, quality.state.recipe)
    washed_rows = measure_rows(roi, quality.state.recipe, stage="washed", data=washed.data)
    assert [r["raw sbr"] for r in quality.rows] == [r["sbr"] for r in raw_rows]
    assert [r["washed sbr"] for r in quality.rows] == [r["sbr"] for r in washed_rows]
    assert [r["washed flags"] for r in quality.rows] == [r["flags"] for r in washed_rows]
    headers = [quality.table.horizontalHeaderItem(c).text() for c in range(quality.table.columnCount())]
    assert "r·SBR" in headers and "w·SBR" in headers and "r·flags" in headers and "w·flags" in headers
    # a raw and a washed bar each
    qtbot.waitUntil(lambda: len(quality.figure.axes[0].patches) == 2 * len(raw_rows), timeout=WAIT_MS)
    quality.stage.setCurrentIndex(0)  # back to one stage: one column per metric
    assert quality.table.columnCount() == len(quality.columns)


# --------------------------------------------------------------------------- Spillover


def test_compensation_is_one_kept_layer_beside_raw(make_napari_viewer, qtbot, cohort):
    """One compensated layer (the receiving channel), made once and then given new pixels: one
    layer per channel made every show / hide walk that many more layers."""
    from plexwash.plugin._layers import studio_layers
    from plexwash.plugin._spillover import compensated_stack
    from plexwash.qc.spillover import read_spillover

    viewer = make_napari_viewer()
    spill = dock(viewer, "Spillover")
    cohort_widget = open_first_roi(qtbot, viewer, cohort)
    spill.load(cohort / "truth" / "spillover.csv")
    inserted = []
    viewer.layers.events.inserted.connect(lambda event: inserted.append(event.value.name))
    wait(qtbot, spill.preview())
    (made,) = studio_layers(viewer, stage="compensated")
    roi = spill.state.roi
    used, expected = compensated_stack(roi, read_spillover(cohort / "truth" / "spillover.csv"))
    assert inserted == [made.name] and made.visible
    index = made.metadata["plexwash"]["index"]
    assert roi.channels[index] == spill.receiver.currentText()
    np.testing.assert_array_equal(made.data, expected[used.index(index)])
    assert tuple(made.contrast_limits) == tuple(viewer.layers[roi.labels[index]].contrast_limits)
    assert viewer.layers.selection.active is None or viewer.layers.selection.active.metadata.get(
        "plexwash", {}).get("stage") != "compensated"

    wait(qtbot, cohort_widget.load(1))  # another ROI, then compensate again: same layer, new pixels
    wait(qtbot, spill.preview())
    (again,) = studio_layers(viewer, stage="compensated")
    assert again is made and len(inserted) == 1
    roi = spill.state.roi
    _, expected = compensated_stack(roi, read_spillover(cohort / "truth" / "spillover.csv"))
    np.testing.assert_array_equal(again.data, expected[used.index(again.metadata["plexwash"]["index"])])
    assert again.metadata["plexwash"]["roi"] == str(roi.path)


# --------------------------------------------------------------------------- Cohort


def test_tissue_mask_outline_is_the_engines_mask(make_napari_viewer, qtbot, cohort):
    from plexwash.plugin._mask import MASK_LAYER
    from plexwash.qc.background import tissue_mask

    viewer = make_napari_viewer()
    widget = open_first_roi(qtbot, viewer, cohort)
    widget.tissue.setChecked(True)
    qtbot.waitUntil(lambda: MASK_LAYER in viewer.layers, timeout=WAIT_MS)
    roi = widget.state.roi
    expected = tissue_mask(np.asarray(roi.data), used=np.asarray(roi.use, bool))
    layer = viewer.layers[MASK_LAYER]
    np.testing.assert_array_equal(layer.data.astype(bool), expected)
    assert layer.contour > 0 and layer.visible and "tissue covers" in widget.status.text()
    assert viewer.layers.selection.active is not layer
    widget.tissue.setChecked(False)
    assert not layer.visible
    widget.tissue.setChecked(True)
    wait(qtbot, widget.load(1))
    qtbot.waitUntil(lambda: not widget.busy() and widget.state.roi.path == list_cohort(cohort / "cohort")[1],
                    timeout=WAIT_MS)
    roi = widget.state.roi
    expected = tissue_mask(np.asarray(roi.data), used=np.asarray(roi.use, bool))
    np.testing.assert_array_equal(viewer.layers[MASK_LAYER].data.astype(bool), expected)


def test_docks_scroll_instead_of_squeezing_the_lists(make_napari_viewer, qtbot, cohort):
    viewer = make_napari_viewer(show=True)
    widget = open_first_roi(qtbot, viewer, cohort)
    rows = widget.channels.sizeHintForRow(0)
    assert widget.channels.minimumHeight() >= 8 * rows  # at least eight channels always show
    assert widget.table.minimumHeight() >= 5 * widget.table.verticalHeader().defaultSectionSize()
    widget.resize(360, 260)  # a short dock: the content scrolls, the status line stays visible
    qtbot.wait(50)
    assert widget.scroll.verticalScrollBar().maximum() > 0
    assert widget.status.parent() is widget
