"""The studio's Audit dock widget in a real napari viewer under Xvfb: the pair overlay is the
engine's (qc/audit.py audit_pair), and the composite shown is the run's file."""

from __future__ import annotations

import numpy as np
import pytest

from .test_audit import MARKERS, TAGS, tissue

pytestmark = pytest.mark.gui

WAIT_MS = 120_000  # generous: the test machine is shared


def wait(qtbot, worker):
    assert worker is not None
    qtbot.waitUntil(lambda: getattr(worker, "finished_handled", False), timeout=WAIT_MS)


@pytest.fixture
def run_folder(tmp_path):
    """One ROI with spillover between two exclusive markers, run with roles and the pair."""
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.run import run_cohort
    from plexwash.qc.spillover import write_spillover

    cohort = tmp_path / "cohort"
    cohort.mkdir()
    raw, matrix = tissue(31)
    write_ome_tiff(cohort / "roi_31.ome.tiff", raw, list(TAGS), labels=list(MARKERS))
    (cohort / "stains.csv").write_text("tag,marker,wash,role\nNd146,CD20,yes,membrane\n"
                                       "Nd147,CD3,yes,membrane\nIr191,DNA,yes,nuclear\n")
    spill = write_spillover(tmp_path / "spill.csv", matrix)
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(f'[compensation]\nspillover = "{spill}"\n\n[audit]\nexclusive = [["CD20", "CD3"]]\n')
    out = tmp_path / "run"
    assert run_cohort(cohort, out, recipe=recipe, progress=False).exit_code == 0
    return cohort, out, recipe, matrix


def test_audit_widget_overlays_the_pair_and_shows_the_composite(make_napari_viewer, qtbot, run_folder):
    from plexwash.plugin._state import studio_state
    from plexwash.qc import load_recipe, read_roi
    from plexwash.qc.audit import audit_pair

    cohort, out, recipe_path, matrix = run_folder
    viewer = make_napari_viewer()
    state = studio_state(viewer)
    recipe = load_recipe(recipe_path)
    state.set_recipe(recipe)
    state.set_spillover(matrix)
    roi = read_roi(cohort / "roi_31.ome.tiff", stains=cohort / "stains.csv")
    _, widget = viewer.window.add_plugin_dock_widget("plexwash", "Audit")
    state.set_roi(roi)
    # the recipe's pair is chosen for the ROI
    assert (widget.first.currentData(), widget.second.currentData()) == ("Nd146", "Nd147")
    wait(qtbot, widget.audit())
    engine = audit_pair(roi, recipe, "Nd146", "Nd147", spillover=matrix)
    both = viewer.layers["audit · co-positive"].data
    assert np.array_equal(both, (engine["overlay"] == 3).astype(np.float32))
    assert np.array_equal(viewer.layers["audit · first"].data, engine["first"])
    assert "raw: co-positive" in widget.result.text() and "above-chance" in widget.result.text()
    # the washed stage is not flagged (the true matrix removed the spillover)
    assert [r["flags"] for r in engine["rows"]] == [["above-chance"], []]

    assert not widget.show_composite()  # no run folder known yet
    state.run_dir = out
    assert widget.show_composite()
    composite = np.asarray(read_roi(out / "roi_31.composite.ome.tiff").data)
    assert np.array_equal(viewer.layers["composite · nuclear"].data, composite[0])
    assert np.array_equal(viewer.layers["composite · membrane"].data, composite[1])
    assert composite[1].max() > 0.5  # the two membrane-role markers do show
