"""Nested cohorts: ROIs in slide folders, ids as relative paths, batches from samples.csv."""

from __future__ import annotations

import csv
import hashlib
import os
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.files import check_output, reached_inputs
from plexwash.qc.io import list_cohort, roi_id, write_ome_tiff
from plexwash.qc.run import read_ledger, run_cohort

CHANNELS = ["Nd143", "Nd144", "Nd145", "Sm147"]
#: Batch B2 was stained brighter in these channels (signal x 3); the batch test must flag
#: exactly these.
BRIGHTER = ("Nd144", "Sm147")


def _tissue(rng, size=40, bright=1.0):
    """Cells (disks of signal) over a Poisson background, one plane."""
    yy, xx = np.mgrid[:size, :size]
    signal = np.zeros((size, size))
    for _ in range(10):
        cy, cx = rng.uniform(4, size - 4, 2)
        signal += ((yy - cy) ** 2 + (xx - cx) ** 2 < 9) * rng.uniform(25, 35)
    return rng.poisson(2.0 + bright * signal).astype(np.float32)


def _write_roi(path: Path, rng, brighter: bool):
    planes = [_tissue(rng, bright=3.0 if (brighter and c in BRIGHTER) else 1.0) for c in CHANNELS]
    path.parent.mkdir(parents=True, exist_ok=True)
    write_ome_tiff(path, np.stack(planes), CHANNELS)


@pytest.fixture(scope="module")
def nested(tmp_path_factory):
    """16 ROIs on 4 slides (two names repeat across slides), batches B1 (slides 1-2) and B2 (3-4)."""
    root = tmp_path_factory.mktemp("nested") / "cohort"
    rng = np.random.default_rng(16)
    rows = [("file", "batch", "patient")]
    for s in range(1, 5):
        for r in range(1, 5):
            name = f"slide{s:02d}/r{r:02d}.ome.tiff" if s != 4 else f"slide04/deep/r{r:02d}.ome.tiff"
            batch = "B1" if s <= 2 else "B2"
            _write_roi(root / name, rng, brighter=batch == "B2")
            rows.append((name, batch, f"P{s}"))
    with open(root / "samples.csv", "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    return root


def test_list_cohort_finds_rois_at_any_depth_and_skips_hidden_run_and_loops(tmp_path, small_stack):
    root = tmp_path / "c"
    for name in ("a.ome.tiff", "s1/a.ome.tiff", "s2/x/y/b.ome.tiff", ".hidden/c.ome.tiff",
                 "oldrun/d.ome.tiff"):
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        write_ome_tiff(root / name, small_stack, ["A", "B", "C"])
    (root / "oldrun" / "ledger.jsonl").write_text("")  # a run folder: never entered
    os.symlink(root, root / "s2" / "x" / "loop")  # a loop back to the cohort root
    found = list_cohort(root)
    assert [roi_id(p, root) for p in found] == ["a", "s1/a", "s2/x/y/b"]
    assert list_cohort(root, skip=[root / "s1"])[1].name == "b.ome.tiff"


def test_empty_nested_cohort_is_an_input_error(tmp_path):
    (tmp_path / "s1" / ".deep").mkdir(parents=True)
    with pytest.raises(InputError, match="no ROI found"):
        list_cohort(tmp_path)


@pytest.fixture(scope="module")
def nested_run(nested, tmp_path_factory):
    out = tmp_path_factory.mktemp("run") / "out"
    summary = run_cohort(nested, out, progress=False)
    assert summary.exit_code == 0 and summary.done == 16
    return out


def test_run_mirrors_the_tree_and_ids_are_relative_paths(nested_run):
    records = read_ledger(nested_run)
    ids = sorted(r["roi"] for r in records)
    assert "slide01/r01" in ids and "slide02/r01" in ids and "slide04/deep/r04" in ids
    assert len(set(ids)) == 16  # equal names on different slides stay distinct
    for record in records:
        assert record["output"] == record["roi"] + ".ome.tiff"
        assert (nested_run / record["output"]).is_file()
        assert {row["roi"] for row in record["quality"]} == {record["roi"]}
        assert record["sample"]["batch"] == ("B1" if record["roi"] < "slide03" else "B2")
    with open(nested_run / "quality.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert {r["roi"] for r in rows} == set(ids)
    assert {(r["roi"], r["batch"], r["patient"]) for r in rows if r["roi"] == "slide03/r02"} == {
        ("slide03/r02", "B2", "P3")}


def test_rerun_of_a_nested_cohort_skips_everything(nested, nested_run):
    summary = run_cohort(nested, nested_run, progress=False)
    assert (summary.done, summary.skipped) == (0, 16)


def test_batch_test_flags_exactly_the_brighter_channels(nested_run):
    with open(nested_run / "batches.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    raw = {r["channel"] for r in table if r["stage"] == "raw" and r["differs"] == "true"}
    assert raw == set(BRIGHTER)
    signal = {r["channel"]: r for r in table if r["stage"] == "raw" and r["metric"] == "p99"}
    assert signal["Nd144"]["high"] == "B2" and float(signal["Nd144"]["fold"]) > 2


def test_report_lists_every_roi_and_the_batch_section(nested_run):
    page = (nested_run / "report.html").read_text(encoding="utf-8")
    assert 'id="batches"' in page and 'id="sheets"' in page
    for record in read_ledger(nested_run):
        assert f'data-roi="{record["roi"]}"' in page
    assert "batch-effect" in page and "Kruskal" in page


def test_a_run_folder_inside_the_cohort_is_not_read_as_rois(nested, nested_run, tmp_path):
    import shutil

    cohort = tmp_path / "copy"
    shutil.copytree(nested, cohort)
    shutil.copytree(nested_run, cohort / "slide01" / "old-run")  # washed stacks + ledger.jsonl
    assert len(list_cohort(cohort)) == 16
    summary = run_cohort(cohort, tmp_path / "run", progress=False)
    assert summary.done == 16


@pytest.mark.slow
def test_per_batch_spillover_is_recorded_and_guarded(nested, tmp_path):
    import shutil

    from plexwash.qc.spillover import SpilloverMatrix, write_spillover

    cohort = tmp_path / "cohort"
    shutil.copytree(nested, cohort)
    for batch, value in (("B1", 0.02), ("B2", 0.05)):
        values = np.eye(len(CHANNELS))
        values[0, 1] = value
        write_spillover(tmp_path / f"spill_{batch}.csv", SpilloverMatrix(tuple(CHANNELS), values))
    rows = list(csv.reader((cohort / "samples.csv").read_text().splitlines()))
    rows[0].append("spillover")
    for row in rows[1:]:
        row.append(f"../spill_{row[1]}.csv")
    with open(cohort / "samples.csv", "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    out = tmp_path / "run"
    assert run_cohort(cohort, out, progress=False).done == 16
    by_batch = {}
    for record in read_ledger(out):
        by_batch.setdefault(record["sample"]["batch"], set()).add(record["spillover_sha256"])
    assert all(len(hashes) == 1 for hashes in by_batch.values())
    assert by_batch["B1"] != by_batch["B2"]
    for batch, hashes in by_batch.items():
        copies = list(out.glob(f"spillover-batch-{batch}*.csv"))
        # reference: hashlib.sha256 of the run's copy of the batch's matrix
        assert [hashlib.sha256(copies[0].read_bytes()).hexdigest()] == list(hashes)
    # the matrices a sheet names are inputs: nothing may write over them
    inputs = reached_inputs([cohort / "samples.csv"])
    assert (cohort / "../spill_B1.csv") in inputs
    with pytest.raises(InputError, match="input"):
        check_output(tmp_path / "spill_B1.csv", inputs)
    with pytest.raises(InputError, match="input"):
        check_output(cohort / "samples.csv", reached_inputs([cohort]))


@pytest.mark.slow
def test_dropping_the_sheet_drops_the_batches(nested, tmp_path):
    import shutil

    cohort = tmp_path / "cohort"
    shutil.copytree(nested, cohort)
    out = tmp_path / "run"
    run_cohort(cohort, out, progress=False)
    assert (out / "samples.csv").is_file()
    (cohort / "samples.csv").unlink()
    summary = run_cohort(cohort, out, progress=False)
    assert summary.skipped == 16
    assert not (out / "samples.csv").exists()
    with open(out / "quality.csv", newline="") as fh:
        assert "batch" not in next(csv.reader(fh))
