"""One quality entry point (quality.measure_roi): inspect, the run and the studio agree.

``plexwash inspect``, the rows a run writes to ``quality.csv`` and the studio's Quality
widget all measure through :func:`plexwash.qc.quality.measure_roi`: raw with the
spillover matrix in the ghost model, washed judged against raw.
"""

from __future__ import annotations

import numpy as np
from plexwash.qc.cli import inspection
from plexwash.qc.io import read_roi, write_ome_tiff
from plexwash.qc.quality import measure_roi, measure_stack, quality_rows
from plexwash.qc.recipe import default_recipe
from plexwash.qc.run import read_ledger, run_cohort
from plexwash.qc.spillover import SpilloverMatrix, write_spillover


def _cohort(tmp_path, unseen):
    roi, matrix, _ = unseen
    cut = roi.data[:8, :160, :150]
    names = roi.channels[:8]
    folder = tmp_path / "cohort"
    folder.mkdir()
    write_ome_tiff(folder / "a.ome.tiff", cut.astype(np.uint16), list(names))
    values = np.asarray(matrix.values)[:8, :8]
    spill = tmp_path / "spill.csv"
    write_spillover(spill, SpilloverMatrix(tuple(names), values))
    return folder, spill, SpilloverMatrix(tuple(names), values)


def test_inspect_run_and_studio_rows_are_the_same_measurement(tmp_path, unseen):
    folder, spill_path, matrix = _cohort(tmp_path, unseen)
    recipe = default_recipe().replace("compensation", spillover=str(spill_path))
    out = tmp_path / "out"
    run_cohort(folder, out, recipe=recipe, progress=False)
    record = [r for r in read_ledger(out) if r["status"] == "done"][-1]
    roi = read_roi(folder / "a.ome.tiff")
    washed = read_roi(out / record["output"]).data
    measured = measure_roi(roi, recipe, spillover=matrix, washed=washed)
    ledger_rows = record["quality"]
    assert [r for r in ledger_rows if r["stage"] == "raw"] == measured.raw_rows
    assert [r for r in ledger_rows if r["stage"] == "washed"] == measured.washed_rows
    assert record["roi_flags"] == measured.flags

    report = inspection(roi, recipe)  # the recipe names the matrix: inspect uses it too
    assert [c["sbr"] for c in report["channels"]] == [r["sbr"] for r in measured.raw_rows]
    assert [c["flags"] for c in report["channels"]] == [r["flags"] for r in measured.raw_rows]

    # the washed stage is judged against raw: a channel empty in raw stays empty
    for raw_row, washed_row in zip(measured.raw_rows, measured.washed_rows, strict=True):
        assert "empty" not in raw_row["flags"] or "empty" in washed_row["flags"]
    alone = quality_rows(measure_stack(washed, roi.channels), roi=roi.name, stage="washed")
    assert [r["sbr"] for r in alone] == [r["sbr"] for r in measured.washed_rows]  # same measurement


def test_studio_quality_rows_are_the_run_rows(tmp_path, unseen):
    from plexwash.qc.wash import compute, wash

    plugin_quality = __import__("pytest").importorskip("plexwash.plugin._quality")
    folder, _, matrix = _cohort(tmp_path, unseen)
    roi = read_roi(folder / "a.ome.tiff")
    recipe = default_recipe()
    washed = compute(wash(roi, recipe, spillover=matrix)).data
    measured = measure_roi(roi, recipe, spillover=matrix, washed=washed)
    assert plugin_quality.measure_rows(roi, recipe, spillover=matrix) == measured.raw_rows
    assert plugin_quality.measure_rows(roi, recipe, stage="washed", data=washed, spillover=matrix) == \
        measured.washed_rows
