"""Screenshots of each mode of the studio, for a reviewer to open.

Written to the ``artifacts`` folder beside this file (ignored by git): the labelled grid,
the one-channel view, the preview (raw | washed | removed, labelled), and the Quality
widget with its flags column in view (one stage, and raw | washed side by side), the
spillover heatmap, and the tissue outline. Each is also checked: the canvas is drawn (not one
flat colour), and the flags column of the quality table lies inside the visible part of
the table.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from plexwash.plugin import launch_studio

from .test_plugin_widgets import WAIT_MS, wait, wait_preview

pytestmark = pytest.mark.gui

ARTIFACTS = Path(__file__).with_name("artifacts")


def lit(image) -> float:
    """Fraction of pixels brighter than the dark background."""
    return float((np.asarray(image)[..., :3].max(axis=2) > 40).mean())


def test_screenshots_of_each_mode(make_napari_viewer, qtbot, demo_dir):
    ARTIFACTS.mkdir(exist_ok=True)
    viewer = make_napari_viewer(show=True)
    launch_studio(demo_dir / "cohort", viewer=viewer, run=False)
    viewer.window.resize(1280, 1000)  # the whole test screen: a canvas wide enough to judge
    widgets = {name.split(" (")[0]: w for name, w in viewer.window.dock_widgets.items()}
    cohort, speckle, quality = widgets["Cohort"], widgets["Speckle"], widgets["Quality"]
    qtbot.waitUntil(lambda: cohort.state.roi is not None, timeout=WAIT_MS)
    wait_preview(qtbot, speckle)
    widgets["Spillover"].load(demo_dir / "truth" / "spillover.csv")

    roi = cohort.state.roi
    cohort.channels.setCurrentRow(roi.channels.index("Nd143"))
    shots = {}
    for view in ("grid", "single", "preview"):
        cohort.set_view(view)
        wait_preview(qtbot, speckle)
        qtbot.waitUntil(lambda: speckle.runner.idle, timeout=WAIT_MS)
        qtbot.wait(300)
        path = ARTIFACTS / f"studio_{view}.png"
        shots[view] = viewer.screenshot(path=str(path), canvas_only=False)
        assert path.is_file()
        canvas = viewer.screenshot(canvas_only=True)
        assert 0.003 < lit(canvas) < 0.95, view  # drawn, not blank, not washed out
    labels = viewer.layers["plexwash labels"]
    assert labels.visible and list(labels.features["label"])[1:] == [
        f"{roi.labels[2]} · washed", f"{roi.labels[2]} · removed"]

    # Quality: an ROI with flags (the failed stain), its table with the flags column in view
    quality.parent().raise_()  # its tab in front, for the window screenshot
    wait(qtbot, quality.measure())
    quality.stage.setCurrentIndex(1)
    wait(qtbot, quality.measure())
    assert any(row["flags"] for row in quality.rows)
    qtbot.wait(200)
    from plexwash.plugin._quality import COLUMNS

    flags = [c[0] for c in COLUMNS].index("flags")
    table = quality.table
    flagged = [r for r in range(table.rowCount()) if table.item(r, flags).text()]
    assert table.visualItemRect(table.item(flagged[0], flags)).intersects(table.viewport().rect())
    right = table.columnViewportPosition(flags) + min(table.columnWidth(flags), 60)
    assert 0 <= table.columnViewportPosition(flags) and right <= table.viewport().width()
    quality.grab().save(str(ARTIFACTS / "studio_quality.png"))
    viewer.screenshot(path=str(ARTIFACTS / "studio_quality_window.png"), canvas_only=False)
    assert (ARTIFACTS / "studio_quality.png").stat().st_size > 5000

    # raw | washed side by side, and the spillover heatmap of the demo's 22 channels
    quality.stage.setCurrentIndex(4)
    wait(qtbot, quality.measure())
    assert quality.shown == ("both", "measure")
    qtbot.waitUntil(lambda: len(quality.figure.axes[0].patches) == 2 * len(quality.rows), timeout=WAIT_MS)
    quality.grab().save(str(ARTIFACTS / "studio_quality_both.png"))
    spill = widgets["Spillover"]
    spill.parent().raise_()
    qtbot.wait(200)
    spill.grab().save(str(ARTIFACTS / "studio_spillover.png"))
    assert spill.canvas.height() >= 22 * 12  # at least 12 px per channel row

    # the tissue outline over the one-channel view
    cohort.tissue.setChecked(True)
    qtbot.waitUntil(lambda: "plexwash tissue" in viewer.layers, timeout=WAIT_MS)
    cohort.set_view("single")
    qtbot.wait(300)
    viewer.screenshot(path=str(ARTIFACTS / "studio_tissue.png"), canvas_only=False)
    assert 0.003 < lit(viewer.screenshot(canvas_only=True)) < 0.95
