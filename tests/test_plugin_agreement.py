"""The studio agrees with the run: the same quality verdicts, ROI by ROI, channel by channel.

A demo run (``run_cohort``) writes ``quality.csv``. The studio, on the same cohort with the
same matrix and recipe, measures raw (Cohort widget) and washed (Quality widget) flags with
the engine's one quality entry point, and must give the run's verdicts for every ROI x
channel x stage. A run folder opened as a cohort shows the run's own table, not a new
measurement of washed files taken for raw ones.
"""

from __future__ import annotations

import pytest
from plexwash.plugin._cohort import read_quality_table, summarize_flags

from .test_plugin_widgets import WAIT_MS, dock, wait

pytestmark = [pytest.mark.gui, pytest.mark.slow]


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory, demo_dir):
    from plexwash.qc.run import run_cohort

    out = tmp_path_factory.mktemp("agreement") / "run"
    run_cohort(demo_dir / "cohort", out, spillover=demo_dir / "truth" / "spillover.csv",
               stains=demo_dir / "stains.csv", progress=False)
    return out


def verdicts(rows) -> dict[str, list[str]]:
    return {row["channel"]: sorted(row["flags"]) for row in rows}


def test_studio_verdicts_equal_the_runs_quality_csv(make_napari_viewer, qtbot, demo_run, demo_dir):
    table = read_quality_table(demo_run / "quality.csv")
    viewer = make_napari_viewer()
    cohort = dock(viewer, "Cohort")
    spill = dock(viewer, "Spillover")
    quality = dock(viewer, "Quality")
    spill.load(demo_dir / "truth" / "spillover.csv")  # the run's matrix, the run's (default) recipe
    wait(qtbot, cohort.open_cohort(demo_dir / "cohort"))
    assert cohort.table.rowCount() == len(table) == 3
    for row in range(cohort.table.rowCount()):
        name = cohort.table.item(row, 0).text()
        wait(qtbot, cohort.load(row))
        # raw: measured in the studio (Cohort widget, in the background), shown by Quality
        qtbot.waitUntil(lambda: bool(quality.rows) and quality.shown == ("raw", "measure"), timeout=WAIT_MS)
        assert quality.rows[0]["stage"] == "raw"
        assert verdicts(quality.rows) == verdicts(table[name]["raw"]), name
        assert cohort.table.item(row, 1).text() == summarize_flags(table[name]["raw"])
        # washed: the studio's wash of the ROI, judged against raw with the matrix, as the run
        quality.stage.setCurrentIndex(1)
        wait(qtbot, quality.measure())
        assert quality.shown == ("washed", "measure")
        assert verdicts(quality.rows) == verdicts(table[name]["washed"]), name

    # the run folder opened as a cohort: the run's own verdicts, raw and washed, unchanged
    assert cohort.open_cohort(demo_run) is None  # nothing re-measured
    for row in range(cohort.table.rowCount()):
        name = cohort.table.item(row, 0).text()
        assert cohort.table.item(row, 1).text() == summarize_flags(table[name]["raw"])
        assert cohort.table.item(row, 2).text() == summarize_flags(table[name]["washed"])
        wait(qtbot, cohort.load(row))
        qtbot.waitUntil(lambda: quality.shown == ("washed", "run") and bool(quality.rows), timeout=WAIT_MS)
        assert quality.rows == table[name]["washed"]
        quality.stage.setCurrentIndex(2)  # the run's raw rows
        assert quality.shown == ("raw", "run") and quality.rows == table[name]["raw"]
