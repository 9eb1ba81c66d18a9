"""The Quality widget matches ROIs by their id (path in the cohort), not their file name:
two slides each holding an ``r01`` keep their own quality rows, measured in the studio
and read from a run's ``quality.csv``. Under Xvfb."""

from __future__ import annotations

import pytest
from plexwash.plugin._quality import measure_rows
from plexwash.plugin._reader import read_with_stains
from plexwash.plugin._state import studio_state
from plexwash.qc.table import quality_csv_text

from .test_plugin_roles_and_batches import MARKERS, TAGS, stack, wait

pytestmark = pytest.mark.gui

WAIT_MS = 120_000
#: Same file name in two slides; only slide_a's CD3 is empty (the engine flags it).
IDS = ("slide_a/r01", "slide_b/r01")


@pytest.fixture
def twins(tmp_path):
    from plexwash.qc.io import write_ome_tiff

    cohort = tmp_path / "cohort"
    for seed, rid in enumerate(IDS):
        path = cohort / f"{rid}.ome.tiff"
        path.parent.mkdir(parents=True, exist_ok=True)
        write_ome_tiff(path, stack(seed, empty_cd3=rid == "slide_a/r01"), list(TAGS), labels=list(MARKERS))
    (cohort / "stains.csv").write_text("tag,marker,wash\nIr191,DNA,yes\nNd146,CD45,yes\n"
                                       "Nd148,CD3,yes\nGd160,Ki67,no\n")
    return cohort


def cd3_flags(rows) -> list[str]:
    return next(row["flags"] for row in rows if row["channel"] == "Nd148")


def studio(make_napari_viewer, cohort):
    viewer = make_napari_viewer()
    _, widget = viewer.window.add_plugin_dock_widget("plexwash", "Cohort")
    _, quality = viewer.window.add_plugin_dock_widget("plexwash", "Quality")
    return viewer, widget, quality, widget.open_cohort(cohort)


def load(qtbot, widget, quality, rid):
    rows = {widget.table.item(r, 0).text(): r for r in range(widget.table.rowCount())}
    wait(qtbot, widget.load(rows[rid]))
    qtbot.waitUntil(lambda: bool(quality.rows) and not quality.busy(), timeout=WAIT_MS)


def test_measured_rows_of_same_name_rois_stay_apart(make_napari_viewer, qtbot, twins):
    viewer, widget, quality, worker = studio(make_napari_viewer, twins)
    wait(qtbot, worker)
    state = studio_state(viewer)
    assert set(state.quality) == set(IDS) and not state.pending_quality
    # each ROI's rows are the engine's rows of its own file
    expected = {rid: cd3_flags(measure_rows(read_with_stains(twins / f"{rid}.ome.tiff"), state.recipe))
                for rid in IDS}
    assert "empty" in expected["slide_a/r01"] and "empty" not in expected["slide_b/r01"]
    for rid in (*IDS, IDS[0]):  # back and forth: the cache must not hand one the other's rows
        load(qtbot, widget, quality, rid)
        assert state.roi_key(state.roi) == rid and state.roi.name == "r01"
        assert cd3_flags(quality.rows) == expected[rid], rid


def test_run_rows_of_same_name_rois_stay_apart(make_napari_viewer, qtbot, twins, tmp_path):
    viewer, widget, quality, worker = studio(make_napari_viewer, twins)
    wait(qtbot, worker)
    state = studio_state(viewer)
    # a run's quality.csv (written by the engine's own writer) naming both ROIs by id; the
    # washed rows differ on purpose: slide_a keeps its empty CD3, slide_b gets a stripe flag
    run = tmp_path / "washed"
    run.mkdir()
    rows = []
    for rid in IDS:
        for row in measure_rows(read_with_stains(twins / f"{rid}.ome.tiff"), state.recipe):
            washed = dict(row, roi=rid, stage="washed")
            if rid == "slide_b/r01" and row["channel"] == "Nd148":
                washed["flags"] = ["striped"]
            rows.append(washed)
    (run / "quality.csv").write_text(quality_csv_text(rows))
    widget.use_run_folder(run)
    washed_run = next(i for i in range(quality.stage.count()) if quality.stage.itemData(i) == ("washed", "run"))
    for rid, flags in (("slide_b/r01", ["striped"]), ("slide_a/r01", ["empty"])):
        load(qtbot, widget, quality, rid)
        quality.stage.setCurrentIndex(washed_run)
        assert quality.shown == ("washed", "run")
        assert [f for f in cd3_flags(quality.rows) if f in ("empty", "striped")] == flags, rid
        assert quality.run_rows(state.roi, "washed") is not None
        assert quality.run_rows("r01", "washed") is None  # the bare file name names no ROI
