"""The studio's role chooser (Audit widget) and the Cohort widget's ROI list (ids, batches,
filters), on a tiny nested cohort in two batches written here, under Xvfb."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.plugin._cohort import summarize_flags
from plexwash.plugin._quality import measure_rows
from plexwash.plugin._reader import read_with_stains
from plexwash.plugin._roi_list import (
    ALL_BATCHES,
    ANY_FLAGS,
    FLAGGED,
    UNFLAGGED,
    flag_names,
    roi_entries,
)
from plexwash.plugin._state import studio_state
from plexwash.qc import read_roi
from plexwash.qc.io import list_cohort, read_stains, roi_id

WAIT_MS = 120_000  # generous: the test machine is shared
TAGS = ("Ir191", "Nd146", "Nd148", "Gd160")
MARKERS = ("DNA", "CD45", "CD3", "Ki67")
#: ROI id -> batch; slide_a/r01 and slide_b/r01 share a file name.
BATCHES = {"slide_a/r01": "B1", "slide_a/r02": "B1", "slide_b/r01": "B2", "slide_b/deep/r03": "B2"}
EMPTY_ROI = "slide_a/r02"  # its CD3 channel is all zeros: the engine flags it empty


def stack(seed: int, *, empty_cd3: bool = False) -> np.ndarray:
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:64, :64]
    nuclei = np.zeros((64, 64))
    for cy, cx in rng.uniform(8, 56, size=(12, 2)):
        nuclei += np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / 8.0)
    data = np.stack([rng.poisson(1 + 40 * nuclei), rng.poisson(2 + 40 * nuclei),
                     rng.poisson(2 + 30 * nuclei), rng.poisson(1 + 30 * nuclei)]).astype(np.float32)
    if empty_cd3:
        data[2] = 0
    return data


@pytest.fixture
def nested(tmp_path):
    """Four ROIs in slide folders (one two levels deep), a stain sheet with one unwashed
    channel and a sample sheet putting each slide in its own batch."""
    from plexwash.qc.io import write_ome_tiff

    cohort = tmp_path / "cohort"
    for seed, rid in enumerate(BATCHES):
        path = cohort / f"{rid}.ome.tiff"
        path.parent.mkdir(parents=True, exist_ok=True)
        write_ome_tiff(path, stack(seed, empty_cd3=rid == EMPTY_ROI), list(TAGS), labels=list(MARKERS))
    (cohort / "stains.csv").write_text("tag,marker,wash\nIr191,DNA,yes\nNd146,CD45,yes\n"
                                       "Nd148,CD3,yes\nGd160,Ki67,no\n")
    (cohort / "samples.csv").write_text(
        "file,batch,patient\n" + "".join(f"{rid}.ome.tiff,{b},P{i}\n" for i, (rid, b) in enumerate(BATCHES.items())))
    return cohort


def wait(qtbot, worker):
    assert worker is not None
    qtbot.waitUntil(lambda: getattr(worker, "finished_handled", False), timeout=WAIT_MS)


def scaled(image, low, high):
    """Numpy reference of one contributing channel: clipped at its own percentiles
    (``numpy.percentile``, linear) and scaled to [0, 1], as issue 15 defines the composites."""
    lo, hi = np.percentile(image, [low, high])
    return np.clip((image.astype(np.float64) - lo) / (hi - lo), 0.0, 1.0)


# --------------------------------------------------------------------------- plain functions


def test_roi_entries_give_ids_and_batches_and_report_a_sheet_that_does_not_fit(nested):
    rois = list_cohort(nested)
    entries, problem = roi_entries(nested, rois)
    assert problem is None
    assert {rid: batch for rid, _path, batch in entries} == BATCHES
    assert len({rid for rid, _p, _b in entries}) == 4  # same file name, distinct ids
    (nested / "samples.csv").write_text("file,batch\nslide_a/r01.ome.tiff,B1\nslide_z/r09.ome.tiff,B3\n")
    entries, problem = roi_entries(nested, rois)
    assert "slide_z/r09" in problem and "samples.csv" in problem
    assert [batch for _r, _p, batch in entries] == [""] * 4  # no batches rather than wrong ones


# --------------------------------------------------------------------------- Audit: roles


@pytest.mark.gui
def test_roles_preview_the_composite_and_save_a_new_stain_sheet(make_napari_viewer, qtbot, nested, tmp_path):
    viewer = make_napari_viewer()
    state = studio_state(viewer)
    state.set_cohort(nested, list_cohort(nested))
    roi = read_roi(nested / "slide_b" / "r01.ome.tiff", stains=nested / "stains.csv")
    _, widget = viewer.window.add_plugin_dock_widget("plexwash", "Audit")
    state.set_roi(roi)
    assert list(widget.role_boxes) == ["Ir191", "Nd146", "Nd148"]  # Gd160 has wash = no: no role
    assert "cohort-wide" in widget.findChild(type(widget.status), "roles_note").text()

    widget.set_role("Ir191", "nuclear")
    assert widget.preview_roles() is None and "membrane" in widget.status.text()
    assert widget.save_stains(tmp_path / "half.csv") is None and not (tmp_path / "half.csv").exists()
    widget.set_role("Nd146", "membrane")
    widget.set_role("Nd148", "membrane")
    wait(qtbot, widget.preview_roles())
    settings = state.recipe.composite
    low, high = settings.low_percentile, settings.high_percentile
    data = np.asarray(roi.data, np.float32)
    nuclear = scaled(data[0], low, high)
    membrane = (scaled(data[1], low, high) + scaled(data[2], low, high)) / 2  # the default: mean
    np.testing.assert_allclose(viewer.layers["composite · nuclear"].data, nuclear, atol=1e-6)
    np.testing.assert_allclose(viewer.layers["composite · membrane"].data, membrane, atol=1e-6)

    out = tmp_path / "sheets" / "stains_roles.csv"
    assert widget.save_stains(out) == out
    sheet = read_stains(out)
    assert sheet.tags == TAGS and sheet.markers == MARKERS
    assert sheet.wash == (True, True, True, False)
    assert sheet.roles == ("nuclear", "membrane", "membrane", "")
    widget.set_role("Nd148", "")
    assert widget.save_stains(out) == out  # plexwash's own sheet may be replaced
    assert read_stains(out).roles == ("nuclear", "membrane", "", "")

    for refused in (nested / "stains.csv", nested / "samples.csv"):  # an input; not plexwash's
        before = refused.read_bytes()
        assert widget.save_stains(refused) is None
        assert refused.read_bytes() == before
        assert widget.status.text().startswith(f"error: {refused}")


# --------------------------------------------------------------------------- Cohort: ROI list


@pytest.mark.gui
def test_roi_list_shows_ids_and_batches_and_filters_hide_rows(make_napari_viewer, qtbot, nested):
    viewer = make_napari_viewer()
    _, widget = viewer.window.add_plugin_dock_widget("plexwash", "Cohort")
    wait(qtbot, widget.open_cohort(nested))
    table = widget.table
    rows = {table.item(r, 0).text(): r for r in range(table.rowCount())}
    assert set(rows) == set(BATCHES)
    assert {rid: table.item(r, 3).text() for rid, r in rows.items()} == BATCHES
    # each ROI's flags are the engine's quality of the raw ROI
    state = studio_state(viewer)
    flags = {roi_id(p, nested): flag_names(summarize_flags(measure_rows(read_with_stains(p), state.recipe)))
             for p in list_cohort(nested)}
    assert "empty" in flags[EMPTY_ROI] and any(not names for names in flags.values())

    def shown():
        return {rid for rid, r in rows.items() if not table.isRowHidden(r)}

    assert shown() == set(BATCHES)
    widget.batch_filter.setCurrentText("B2")
    assert shown() == {"slide_b/r01", "slide_b/deep/r03"}
    widget.batch_filter.setCurrentText("B1")
    assert widget.flag_filter.findText("empty") >= 0
    widget.flag_filter.setCurrentText("empty")
    expected = {rid for rid, names in flags.items() if "empty" in names and BATCHES[rid] == "B1"}
    assert shown() == expected and EMPTY_ROI in expected and "slide_a/r01" not in expected
    widget.batch_filter.setCurrentText(ALL_BATCHES)
    assert shown() == {rid for rid, names in flags.items() if "empty" in names}
    widget.flag_filter.setCurrentText(FLAGGED)
    assert shown() == {rid for rid, names in flags.items() if names}
    widget.flag_filter.setCurrentText(UNFLAGGED)
    assert shown() == {rid for rid, names in flags.items() if not names}
    widget.flag_filter.setCurrentText(ANY_FLAGS)
    assert shown() == set(BATCHES)

    # loading by row still works, and same-name ROIs load their own file
    wait(qtbot, widget.load(rows["slide_b/r01"]))
    assert state.roi.path == nested / "slide_b" / "r01.ome.tiff"
    wait(qtbot, widget.load(rows["slide_a/r01"]))
    assert state.roi.path == nested / "slide_a" / "r01.ome.tiff"
