"""A spillover matrix per batch named in the recipe (``[compensation.batches]``).

Each rule is checked: a batch the cohort does not have, a run without a sample sheet, a
matrix that differs from the sheet's for the same batch, and a missing file all stop the
run before anything is written (exit 2, one line naming the file); the matrices are
protected inputs; a wash of two batches compensates each ROI with its own batch's matrix,
records it in the ledger, ``quality.csv`` and the run's recipe copy, and a changed matrix
redoes exactly its batch.
"""

from __future__ import annotations

import csv
import hashlib

import numpy as np
import pytest
from plexwash.qc.cli import main
from plexwash.qc.errors import InputError
from plexwash.qc.io import read_roi, write_ome_tiff
from plexwash.qc.recipe import load_recipe
from plexwash.qc.run import read_ledger, run_cohort
from plexwash.qc.spillover import SpilloverMatrix, read_spillover, write_spillover
from plexwash.qc.wash import wash

CHANNELS = ("Nd143", "Nd144", "Nd145")
#: ROI -> batch: two slides, two batches.
ROIS = {"s1/a": "B1", "s1/b": "B1", "s2/a": "B2", "s2/b": "B2"}


def _matrix(value: float) -> SpilloverMatrix:
    values = np.eye(len(CHANNELS))
    values[0, 1] = value  # Nd143 spills into Nd144
    return SpilloverMatrix(CHANNELS, values)


@pytest.fixture
def world(tmp_path):
    """A cohort of 4 ROIs with a sample sheet, two batch matrices and a recipe naming them."""
    rng = np.random.default_rng(16)
    cohort = tmp_path / "cohort"
    for rid in ROIS:
        source = rng.poisson(40.0, (32, 32)).astype(np.float32)
        stack = np.stack([source, rng.poisson(2.0, (32, 32)) + 0.3 * source,
                          rng.poisson(5.0, (32, 32))]).astype(np.float32)
        (cohort / rid).parent.mkdir(parents=True, exist_ok=True)
        write_ome_tiff(cohort / f"{rid}.ome.tiff", stack, list(CHANNELS))
    with open(cohort / "samples.csv", "w", newline="") as fh:
        csv.writer(fh).writerows([("file", "batch"), *((f"{r}.ome.tiff", b) for r, b in ROIS.items())])
    spill = tmp_path / "controls"
    spill.mkdir()
    write_spillover(spill / "b1.csv", _matrix(0.10))
    write_spillover(spill / "b2.csv", _matrix(0.30))
    recipe = tmp_path / "recipe.toml"
    _recipe(recipe, {"B1": "controls/b1.csv", "B2": "controls/b2.csv"})
    return tmp_path, cohort, recipe


def _recipe(path, table, extra=""):
    lines = ["[speckle]", "enabled = false", "[hot_pixels]", "enabled = false", extra,
             "[compensation.batches]", *(f'{b} = "{n}"' for b, n in table.items())]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_recipe_reads_writes_and_hashes_the_batch_table(tmp_path):
    path = tmp_path / "r.toml"
    _recipe(path, {"B1": "m/b1.csv", '"batch two"': "b2.csv"})
    recipe = load_recipe(path)
    assert dict(recipe.batch_spillover) == {"B1": "m/b1.csv", "batch two": "b2.csv"}
    assert recipe.batch_spillover_paths() == {"B1": tmp_path / "m/b1.csv", "batch two": tmp_path / "b2.csv"}
    again = tmp_path / "again.toml"
    again.write_text(recipe.to_toml(), encoding="utf-8")
    assert load_recipe(again).batch_spillover == recipe.batch_spillover
    assert load_recipe(again).sha256() == recipe.sha256()
    assert recipe.with_batch_spillover({"B1": "other.csv"}).sha256() != recipe.sha256()
    assert recipe.with_batch_spillover({}).sha256() == load_recipe(None).replace(
        "speckle", enabled=False).replace("hot_pixels", enabled=False).sha256()
    path.write_text("[compensation.batches]\nB1 = 3\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"r\.toml: compensation\.batches\.B1 must name a spillover"):
        load_recipe(path)
    path.write_text("[compensation]\nbatches = 'x.csv'\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"compensation\.batches must be a table"):
        load_recipe(path)


def _refused(capsys, cohort, out, recipe, *extra):
    assert main(["run", str(cohort), "-o", str(out), "--quiet", "--recipe", str(recipe), *extra]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and "\n" not in err
    assert not out.exists()  # nothing written
    return err


def test_each_bad_batch_table_exits_2_naming_the_file(world, capsys):
    tmp, cohort, recipe = world
    out = tmp / "run"
    _recipe(recipe, {"B1": "controls/b1.csv", "B9": "controls/b2.csv"})
    err = _refused(capsys, cohort, out, recipe)
    assert f"{recipe}: [compensation.batches] names batch 'B9', which no ROI" in err
    _recipe(recipe, {"B1": "controls/b1.csv", "B2": "controls/gone.csv"})
    assert f"{tmp / 'controls' / 'gone.csv'}: file not found" in _refused(capsys, cohort, out, recipe)
    _recipe(recipe, {"B1": "controls/b1.csv"})
    sheet = tmp / "other.csv"
    with open(sheet, "w", newline="") as fh:
        csv.writer(fh).writerows([("file", "batch", "spillover"),
                                  *((f"{r}.ome.tiff", b, "controls/b2.csv") for r, b in ROIS.items())])
    err = _refused(capsys, cohort, out, recipe, "--samples", str(sheet))
    assert f"{recipe}: [compensation.batches] gives batch 'B1' b1.csv, but the sample sheet" in err
    (cohort / "samples.csv").unlink()
    err = _refused(capsys, cohort, out, recipe)
    assert f"{recipe}: [compensation.batches] names batch(es) B1 but the run has no sample sheet" in err


def test_the_same_matrix_in_sheet_and_recipe_is_no_conflict(world):
    from plexwash.qc.run.plan import check_inputs

    tmp, cohort, recipe = world
    sheet = tmp / "other.csv"
    with open(sheet, "w", newline="") as fh:  # the sheet names B1's file by another path
        csv.writer(fh).writerows([("file", "batch", "spillover"),
                                  *((f"{r}.ome.tiff", b, "controls/../controls/b1.csv" if b == "B1" else "")
                                    for r, b in ROIS.items())])
    inputs = check_inputs(cohort, tmp / "run", recipe=recipe, spillover=None, stains=None, samples=sheet)
    assert sorted(inputs.samples.matrices) == ["B1", "B2"]
    assert not (tmp / "run").exists()


def test_batch_matrices_are_protected_inputs(world, capsys):
    tmp, cohort, recipe = world
    out = tmp / "run"
    out.mkdir()
    # a batch matrix kept in the output folder under the very name the run's copy would take
    victim = out / "spillover-batch-B1.csv"
    write_spillover(victim, _matrix(0.10))
    before = victim.read_bytes()
    _recipe(recipe, {"B1": "run/spillover-batch-B1.csv", "B2": "controls/b2.csv"})
    assert main(["run", str(cohort), "-o", str(out), "--quiet", "--recipe", str(recipe)]) == 2
    err = capsys.readouterr().err.strip()
    assert str(victim) in err and "\n" not in err
    assert victim.read_bytes() == before
    assert sorted(p.name for p in out.iterdir()) == ["spillover-batch-B1.csv"]  # nothing else written


def test_two_batches_each_roi_compensated_with_its_own_matrix(world):
    tmp, cohort, recipe = world
    out = tmp / "run"
    assert run_cohort(cohort, out, recipe=recipe, progress=False).done == 4
    records = {r["roi"]: r for r in read_ledger(out)}
    copies = {"B1": out / "spillover-batch-B1.csv", "B2": out / "spillover-batch-B2.csv"}
    for batch, copy in copies.items():  # the copies hold the recipe's matrices
        source = read_spillover(tmp / "controls" / f"{batch.lower()}.csv")
        np.testing.assert_array_equal(read_spillover(copy).values, source.values)
    for rid, batch in ROIS.items():
        record = records[rid]
        # reference: hashlib.sha256 of the run's copy of the batch's matrix
        assert record["spillover_sha256"] == hashlib.sha256(copies[batch].read_bytes()).hexdigest()
        assert record["sample"] == {"batch": batch, "spillover": copies[batch].name}
        # the washed pixels are those of a wash with the batch's own matrix, bit for bit
        roi = read_roi(cohort / f"{rid}.ome.tiff")
        expected = wash(roi, load_recipe(recipe), spillover=read_spillover(copies[batch])).data
        got = read_roi(out / f"{rid}.ome.tiff").data
        np.testing.assert_array_equal(np.asarray(got), np.asarray(expected))
    # and the two matrices really differ in effect: B2's removes more of Nd143 from Nd144
    with open(out / "quality.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert {(r["roi"], r["spillover"]) for r in rows} == {(r, copies[b].name) for r, b in ROIS.items()}
    run_recipe = load_recipe(out / "recipe.toml")
    assert run_recipe.batch_spillover_paths() == copies
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "Matrices per batch" in page and "spillover-batch-B2.csv" in page
    # a changed matrix redoes its batch, and only its batch
    write_spillover(tmp / "controls" / "b2.csv", _matrix(0.25))
    again = run_cohort(cohort, out, recipe=recipe, progress=False)
    assert (again.done, again.skipped) == (2, 2)
    redone = [r["roi"] for r in read_ledger(out)][4:]
    assert sorted(redone) == ["s2/a", "s2/b"]


def test_one_roi_wash_protects_batch_matrices_and_says_they_do_not_apply(world, capsys):
    tmp, cohort, recipe = world
    roi = cohort / "s1" / "a.ome.tiff"
    out = tmp / "one.ome.tiff"
    assert main(["wash", str(roi), "-o", str(out), "--recipe", str(recipe)]) == 0
    assert "[compensation.batches] applies to `plexwash run` with a sample sheet" in capsys.readouterr().out
    # a batch matrix (oddly named) is an input of the wash: the output may not replace it
    victim = tmp / "controls" / "b1.ome.tiff"
    victim.write_bytes((tmp / "controls" / "b1.csv").read_bytes())
    before = victim.read_bytes()
    _recipe(recipe, {"B1": "controls/b1.ome.tiff", "B2": "controls/b2.csv"})
    assert main(["wash", str(roi), "-o", str(victim), "--recipe", str(recipe)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and str(victim) in err and "\n" not in err
    assert victim.read_bytes() == before


def test_the_studio_counts_batch_matrices_among_its_inputs(world):
    from plexwash.plugin._state import StudioState
    from plexwash.qc.errors import InputError
    from plexwash.qc.files import check_output

    tmp, cohort, recipe = world
    state = StudioState()
    state.recipe = load_recipe(recipe)
    inputs = state.inputs()
    assert (tmp / "controls" / "b1.csv").resolve() in {p.resolve() for p in inputs}
    with pytest.raises(InputError):  # a studio save over a batch matrix is refused
        check_output(tmp / "controls" / "b2.csv", inputs)
