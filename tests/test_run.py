"""The cohort run: outputs, ledger, resume, failures, interrupts, schedulers, quality table."""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.files import sweep_leftovers
from plexwash.qc.io import read_roi
from plexwash.qc.run import (
    LEDGER,
    QUALITY,
    Ledger,
    RunSummary,
    latest_records,
    quality_table,
    read_ledger,
    read_quality_csv,
    run_cohort,
)

from ._blocking_write import BLOCKING_WRITE

REQUIRED_LEDGER_KEYS = ("roi", "status", "input_sha256", "output", "output_sha256",
                        "recipe_sha256", "version", "seconds")
CHANNELS = ["Nd143", "Nd144", "Nd145", "Nd146", "Sm147", "Gd160", "Ir191", "Ir193"]


def _sha256(path: Path) -> str:
    # reference: hashlib.sha256 over the file's bytes
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _make_cohort(generator, folder: Path, *, n_rois: int, size: int, random_state: int) -> Path:
    rng = np.random.default_rng(random_state)
    stains = generator.random_stains(CHANNELS, rng, failed="Gd160", dim="Sm147")
    generator.simulate_cohort(folder, random_state=random_state, n_rois=n_rois, size=size,
                              control_size=48, stains=stains)
    return folder


def _hashes(folder: Path) -> dict[str, str]:
    return {p.name: _sha256(p) for p in sorted(folder.iterdir()) if p.is_file()}


def _arrays(out: Path, names) -> dict[str, np.ndarray]:
    return {n: np.asarray(read_roi(out / f"{n}.ome.tiff").data) for n in names}


@pytest.fixture(scope="module")
def cohort(tmp_path_factory, generator):
    """Four small ROIs (8 channels) with controls, truth and stains."""
    return _make_cohort(generator, tmp_path_factory.mktemp("stack"), n_rois=4, size=80,
                        random_state=11)


@pytest.fixture(scope="module")
def reference(tmp_path_factory, cohort):
    """One uninterrupted in-process run of the cohort, with the true spillover matrix."""
    before = _hashes(cohort / "cohort")
    out = tmp_path_factory.mktemp("reference")
    summary = run_cohort(cohort / "cohort", out, spillover=cohort / "truth" / "spillover.csv",
                         stains=cohort / "stains.csv", progress=False)
    return {"out": out, "summary": summary, "before": before}


def _names(cohort: Path) -> list[str]:
    return sorted(p.name.split(".")[0] for p in (cohort / "cohort").glob("*.ome.tiff"))


# --------------------------------------------------------------------------- one run


def test_run_writes_every_output(reference, cohort):
    out, summary = reference["out"], reference["summary"]
    names = _names(cohort)
    assert (summary.done, summary.skipped, summary.failed, summary.exit_code) == (4, 0, 0, 0)
    for name in names:
        washed = read_roi(out / f"{name}.ome.tiff")
        raw = read_roi(cohort / "cohort" / f"{name}.ome.tiff")
        assert washed.channels == raw.channels
        assert washed.shape == raw.shape
        assert np.dtype(washed.data.dtype) == np.float32
    for item in ("ledger.jsonl", "quality.csv", "report.html", "recipe.toml", "spillover.csv",
                 "stains.csv", "run.log"):
        assert (out / item).is_file(), item
    # inputs are never modified
    assert _hashes(cohort / "cohort") == reference["before"]


def test_ledger_records_hashes_and_provenance(reference, cohort):
    out = reference["out"]
    lines = (out / LEDGER).read_text().splitlines()
    records = [json.loads(line) for line in lines]  # every line is one JSON object
    assert len(records) == 4
    from plexwash.qc import __version__
    from plexwash.qc.recipe import load_recipe

    recipe = load_recipe(out / "recipe.toml")
    for rec in records:
        for key in REQUIRED_LEDGER_KEYS:
            assert key in rec, key
        assert rec["status"] == "done"
        assert rec["input_sha256"] == _sha256(cohort / "cohort" / f"{rec['roi']}.ome.tiff")
        assert rec["output_sha256"] == _sha256(out / rec["output"])
        assert rec["recipe_sha256"] == recipe.sha256()
        assert rec["spillover_sha256"] == _sha256(out / "spillover.csv")
        assert rec["version"] == __version__
        assert rec["seconds"] > 0
        assert rec["started"] <= rec["finished"]
        assert set(rec["removed_fraction"]) == {"hot_pixels", "compensation", "speckle"}
        for step in rec["removed_fraction"].values():
            assert set(step) == set(CHANNELS)
            assert all(0.0 <= v <= 1.0 for v in step.values())
        assert {r["stage"] for r in rec["quality"]} == {"raw", "washed"}


def test_recipe_copy_is_self_contained(reference, cohort):
    from plexwash.qc.recipe import load_recipe
    from plexwash.qc.spillover import read_spillover

    out = reference["out"]
    recipe = load_recipe(out / "recipe.toml")
    assert recipe.compensation.spillover == "spillover.csv"
    assert recipe.spillover_path() == out / "spillover.csv"
    copy = read_spillover(out / "spillover.csv")
    source = read_spillover(cohort / "truth" / "spillover.csv")
    assert list(copy.channels) == list(source.channels)
    np.testing.assert_array_equal(np.asarray(copy.values), np.asarray(source.values))


def test_washed_pixels_are_the_wash_of_each_roi(reference, cohort):
    from plexwash.qc.recipe import load_recipe
    from plexwash.qc.wash import compute, wash

    out = reference["out"]
    recipe = load_recipe(out / "recipe.toml")
    for name in _names(cohort)[:2]:
        roi = read_roi(cohort / "cohort" / f"{name}.ome.tiff", stains=cohort / "stains.csv")
        direct = compute(wash(roi, recipe))
        np.testing.assert_array_equal(np.asarray(read_roi(out / f"{name}.ome.tiff").data),
                                      np.asarray(direct.data))


def test_quality_csv_rows_and_columns(reference, cohort):
    rows = read_quality_csv(reference["out"] / QUALITY)
    assert len(rows) == 4 * len(CHANNELS) * 2
    header = (reference["out"] / QUALITY).read_text().splitlines()[0].split(",")
    assert header[:7] == ["roi", "channel", "label", "stage", "sbr", "snr", "flags"]
    assert {r["stage"] for r in rows} == {"raw", "washed"}
    assert all(r["sbr"] is not None and r["sbr"] > 0 for r in rows)
    washed = [r for r in rows if r["stage"] == "washed"]
    assert all("removed_speckle" in r for r in washed)



def _truth_flags(cohort: Path):
    """Per (roi, channel): the channel flags the generator's truth calls for, and the striped ROI.

    ``empty`` where the channel holds no true signal in that ROI (truth ``signal`` all 0:
    the failed stain everywhere, and a stain whose cells are missing from a small ROI).
    No other channel flag is planted: no count reaches the uint16 maximum (``saturated``),
    and every stain with signal is well above the SBR limit (``low-sbr``; the dim stain's
    cells hold 1-3 counts a pixel on a background of 0.02-0.3, ranges checked in
    test_demo_cohort.py).
    """
    info = json.loads((cohort / "truth" / "truth.json").read_text())
    expected = {}
    for roi in info["rois"]:
        with np.load(cohort / "truth" / f"{roi['name']}.npz") as z:
            signal = z["signal"]
        for k, channel in enumerate(info["channels"]):
            expected[roi["name"], channel] = {"empty"} if not signal[k].any() else set()
    return expected, info["striped_roi"]


def test_quality_csv_channel_flags_match_the_generator_truth(reference, cohort):
    rows = read_quality_csv(reference["out"] / QUALITY)
    expected, striped_roi = _truth_flags(cohort)
    assert any(flags for flags in expected.values())  # the fixture plants empty channels
    for name in _names(cohort):
        raw = np.asarray(read_roi(cohort / "cohort" / f"{name}.ome.tiff").data)
        assert raw.max() < np.iinfo(np.uint16).max  # nothing saturated in the input
    for row in rows:
        channel_flags = set(row["flags"]) - {"striped"}
        assert channel_flags == expected[row["roi"], row["channel"]], row
        if row["roi"] == striped_roi:
            assert "striped" in row["flags"], row


def test_quality_csv_stripe_flags_match_the_generator_truth(reference, cohort):
    rows = read_quality_csv(reference["out"] / QUALITY)
    _, striped_roi = _truth_flags(cohort)
    flagged = {r["roi"] for r in rows if "striped" in r["flags"]}
    assert flagged == {striped_roi}


def test_quality_csv_modified_z_follows_the_handbook(reference):
    rows = read_quality_csv(reference["out"] / QUALITY)
    groups: dict[tuple, list] = {}
    for row in rows:
        groups.setdefault((row["channel"], row["stage"]), []).append(row)
    for members in groups.values():
        x = np.log([r["sbr"] for r in members])
        median = np.median(x)
        mad = np.median(np.abs(x - median))
        if mad == 0:
            continue
        # NIST/SEMATECH e-Handbook 1.3.5.17: M_i = 0.6745 (x_i - median) / MAD
        expected = 0.6745 * (x - median) / mad
        np.testing.assert_allclose([r["sbr_modified_z"] for r in members], expected, rtol=1e-9)
        for r in members:
            # four ROIs: too few to call outliers (run.OUTLIER_MIN_ROIS), scores still written
            assert "outlier" not in r["flags"]


def test_quality_table_flags_a_planted_outlier(tmp_path):
    ledger = Ledger(tmp_path / LEDGER)
    sbr = [20.0, 22.0, 19.0, 21.0, 20.5, 2.0]  # six ROIs: enough to call outliers
    for k, value in enumerate(sbr):
        rows = [{"roi": f"r{k}", "channel": "CD3", "stage": "raw", "sbr": value, "snr": 1.0,
                 "flags": []}]
        ledger.append({"roi": f"r{k}", "status": "done", "quality": rows,
                       "removed_fraction": {}})
    table = quality_table(tmp_path)
    x = np.log(sbr)
    m = 0.6745 * (x - np.median(x)) / np.median(np.abs(x - np.median(x)))  # NIST 1.3.5.17
    assert [r["roi"] for r in table if "outlier" in r["flags"]] == ["r5"]
    assert abs(m[5]) > 3.5 and np.all(np.abs(m[:5]) <= 3.5)
    np.testing.assert_allclose([r["sbr_modified_z"] for r in table], m)
    for r, score in zip(table, m, strict=True):
        # Iglewicz & Hoaglin: label |M| > 3.5 as a potential outlier
        assert ("outlier" in r["flags"]) == (abs(score) > 3.5)
    # the same values with three ROIs: scores, but no outlier called
    small = tmp_path / "small"
    small.mkdir()
    for k in (0, 1, 5):
        rows = [{"roi": f"r{k}", "channel": "CD3", "stage": "raw", "sbr": sbr[k], "flags": []}]
        Ledger(small / LEDGER).append({"roi": f"r{k}", "status": "done", "quality": rows})
    assert not [r for r in quality_table(small) if "outlier" in r["flags"]]
    assert all(math.isfinite(r["sbr_modified_z"]) for r in quality_table(small))


def test_run_log_has_timestamped_lines(reference):
    lines = (reference["out"] / "run.log").read_text().splitlines()
    assert any("roi_01: done" in line for line in lines)
    for line in lines:
        stamp = line.split(" ", 1)[0]
        assert len(stamp) >= 19 and stamp[4] == "-" and stamp[10] == "T", line


# --------------------------------------------------------------------------- resume


def _copy_run(reference, tmp_path) -> Path:
    out = tmp_path / "run"
    shutil.copytree(reference["out"], out)
    return out


def _rerun(cohort, out, **kwargs):
    kwargs.setdefault("spillover", cohort / "truth" / "spillover.csv")
    return run_cohort(cohort / "cohort", out, stains=cohort / "stains.csv", progress=False, **kwargs)


def test_rerun_skips_what_is_done(reference, cohort, tmp_path):
    out = _copy_run(reference, tmp_path)
    n_lines = len(read_ledger(out))
    stamps = {p.name: p.stat().st_mtime_ns for p in out.glob("*.ome.tiff")}
    summary = _rerun(cohort, out)
    assert (summary.done, summary.skipped, summary.failed) == (0, 4, 0)
    assert len(read_ledger(out)) == n_lines
    assert {p.name: p.stat().st_mtime_ns for p in out.glob("*.ome.tiff")} == stamps


def test_rerun_redoes_changed_missing_and_torn_outputs(reference, cohort, tmp_path):
    out = _copy_run(reference, tmp_path)
    (out / "roi_01.ome.tiff").unlink()
    data = bytearray((out / "roi_02.ome.tiff").read_bytes())
    data[len(data) // 2] ^= 0xFF  # one flipped byte: the hash no longer matches
    (out / "roi_02.ome.tiff").write_bytes(bytes(data))
    torn = (out / "roi_03.ome.tiff").read_bytes()
    (out / "roi_03.ome.tiff").write_bytes(torn[: len(torn) // 3])
    summary = _rerun(cohort, out)
    assert (summary.done, summary.skipped) == (3, 1)
    redone = [r["roi"] for r in read_ledger(out)[4:]]
    assert sorted(redone) == ["roi_01", "roi_02", "roi_03"]
    for name, array in _arrays(out, _names(cohort)).items():
        np.testing.assert_array_equal(array, _arrays(reference["out"], [name])[name])


def _tamper_keeping_size_and_time(path: Path) -> None:
    """Flip one byte in the middle of a file, then put its modification time back."""
    stat = path.stat()
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    assert path.stat().st_size == stat.st_size and path.stat().st_mtime_ns == stat.st_mtime_ns


def test_rerun_skips_by_size_and_time_without_reading_any_file(reference, cohort, tmp_path,
                                                               monkeypatch):
    import plexwash.qc.io as io_package

    out = _copy_run(reference, tmp_path)  # copytree keeps sizes and modification times
    for rec in read_ledger(out):
        assert rec["input_stamp"]["size"] == (cohort / "cohort" / f"{rec['roi']}.ome.tiff").stat().st_size
        assert rec["output_stamp"]["mtime_ns"] == (out / rec["output"]).stat().st_mtime_ns

    hash_small_file = io_package.sha256_path  # the run's recipe, spillover and stains copies

    def no_hashing(path, **kwargs):
        if str(path).endswith(".ome.tiff"):
            raise AssertionError(f"{path} was re-hashed on a default resume")
        return hash_small_file(path, **kwargs)

    monkeypatch.setattr(io_package, "sha256_path", no_hashing)
    closing = {name: (out / name).stat().st_mtime_ns for name in ("quality.csv", "report.html")}
    summary = _rerun(cohort, out)
    assert (summary.done, summary.skipped, summary.failed) == (0, 4, 0)
    # nothing new: the quality table and the report are kept as they are
    assert {name: (out / name).stat().st_mtime_ns for name in closing} == closing
    (out / "report.html").unlink()
    assert _rerun(cohort, out).report == out / "report.html" and (out / "report.html").is_file()


def test_tampered_output_with_same_size_and_time_is_caught_only_by_verify(reference, cohort, tmp_path):
    out = _copy_run(reference, tmp_path)
    _tamper_keeping_size_and_time(out / "roi_02.ome.tiff")
    assert _rerun(cohort, out).skipped == 4  # documented: size and time alone cannot see it
    summary = _rerun(cohort, out, verify=True)
    assert (summary.done, summary.skipped) == (1, 3)
    assert read_ledger(out)[-1]["roi"] == "roi_02"
    np.testing.assert_array_equal(_arrays(out, ["roi_02"])["roi_02"],
                                  _arrays(reference["out"], ["roi_02"])["roi_02"])


def test_cli_run_verify_rehashes_on_resume(reference, cohort, tmp_path):
    from plexwash.qc.cli import main

    out = _copy_run(reference, tmp_path)
    _tamper_keeping_size_and_time(out / "roi_03.ome.tiff")
    args = ["run", str(cohort / "cohort"), "-o", str(out), "--stains", str(cohort / "stains.csv"),
            "--spillover", str(cohort / "truth" / "spillover.csv"), "--quiet"]
    assert main(args) == 0
    assert len(read_ledger(out)) == 4  # nothing redone without --verify
    assert main(args + ["--verify"]) == 0
    assert [r["roi"] for r in read_ledger(out)[4:]] == ["roi_03"]


def test_records_without_stamps_fall_back_to_hashes(reference, cohort, tmp_path):
    out = _copy_run(reference, tmp_path)
    records = read_ledger(out)
    for rec in records:  # as an older plexwash wrote them
        rec.pop("input_stamp"), rec.pop("output_stamp")
    stat = (out / "ledger.jsonl").stat()
    (out / "ledger.jsonl").write_text("".join(json.dumps(r) + "\n" for r in records), encoding="utf-8")
    os.utime(out / "ledger.jsonl", ns=(stat.st_atime_ns, stat.st_mtime_ns))
    _tamper_keeping_size_and_time(out / "roi_01.ome.tiff")
    summary = _rerun(cohort, out)
    assert (summary.done, summary.skipped) == (1, 3)
    assert read_ledger(out)[-1]["roi"] == "roi_01"


def test_rerun_redoes_everything_when_the_recipe_changes(reference, cohort, tmp_path):
    from plexwash.qc.recipe import load_recipe

    out = _copy_run(reference, tmp_path)
    recipe = load_recipe(out / "recipe.toml").replace("speckle", alpha=0.001)
    summary = _rerun(cohort, out, recipe=recipe)
    assert (summary.done, summary.skipped) == (4, 0)
    latest = latest_records(read_ledger(out))
    assert {r["recipe_sha256"] for r in latest.values()} == {load_recipe(out / "recipe.toml").sha256()}


def test_rerun_redoes_a_changed_input(reference, cohort, tmp_path):
    out = _copy_run(reference, tmp_path)
    cohort2 = tmp_path / "stack"
    shutil.copytree(cohort, cohort2)
    roi = read_roi(cohort2 / "cohort" / "roi_02.ome.tiff")
    from plexwash.qc.io import write_ome_tiff

    changed = np.asarray(roi.data).copy()
    changed[0, 5, 5] += 7
    write_ome_tiff(cohort2 / "cohort" / "roi_02.ome.tiff", changed, roi.channels)
    summary = _rerun(cohort2, out)
    assert (summary.done, summary.skipped) == (1, 3)
    assert read_ledger(out)[-1]["roi"] == "roi_02"


# --------------------------------------------------------------------------- failures and bad input


def test_unreadable_roi_is_recorded_and_the_others_finish(cohort, tmp_path):
    folder = tmp_path / "cohort"
    shutil.copytree(cohort / "cohort", folder)
    whole = (folder / "roi_02.ome.tiff").read_bytes()
    (folder / "roi_02.ome.tiff").write_bytes(whole[: len(whole) // 2])  # truncated file
    before = _hashes(folder)
    out = tmp_path / "run"
    summary = run_cohort(folder, out, stains=cohort / "stains.csv", progress=False)
    assert (summary.done, summary.failed, summary.exit_code) == (3, 1, 3)
    assert summary.failed_rois == ("roi_02",)
    failed = [r for r in read_ledger(out) if r["status"] == "failed"]
    assert len(failed) == 1 and "truncated" in failed[0]["error"]
    assert failed[0]["output"] is None and failed[0]["output_sha256"] is None
    assert not (out / "roi_02.ome.tiff").exists()
    assert _hashes(folder) == before
    assert "roi_02" not in {r["roi"] for r in read_quality_csv(out / QUALITY)}
    # a rerun retries only the failed ROI (and fails it again)
    again = run_cohort(folder, out, stains=cohort / "stains.csv", progress=False)
    assert (again.done, again.skipped, again.failed) == (0, 3, 1)


def test_bad_run_arguments_are_input_errors(cohort, tmp_path):
    with pytest.raises(InputError, match="is an input"):
        run_cohort(cohort / "cohort", cohort / "cohort", progress=False)
    with pytest.raises(InputError, match="not found"):
        run_cohort(tmp_path / "missing", tmp_path / "out", progress=False)
    with pytest.raises(InputError, match="either"):
        run_cohort(cohort / "cohort", tmp_path / "out", workers=2, scheduler="tcp://127.0.0.1:1",
                   progress=False)
    with pytest.raises(InputError, match="workers"):
        run_cohort(cohort / "cohort", tmp_path / "out", workers=0, progress=False)
    bad = tmp_path / "bad.csv"
    bad.write_text("nonsense\n")
    with pytest.raises(InputError):
        run_cohort(cohort / "cohort", tmp_path / "out", spillover=bad, progress=False)


def test_a_second_run_into_the_same_folder_is_refused(cohort, tmp_path):
    out = tmp_path / "run"
    out.mkdir()
    from filelock import FileLock

    with FileLock(out / ".plexwash-run.lock", timeout=0):  # another run holds the folder
        with pytest.raises(InputError, match="another plexwash run"):
            run_cohort(cohort / "cohort", out, progress=False)


def test_ledger_survives_a_torn_last_line(tmp_path):
    path = tmp_path / LEDGER
    path.write_text('{"roi": "a", "status": "done"}\n{"roi": "b", "sta')  # killed mid-line
    assert [r["roi"] for r in read_ledger(tmp_path)] == ["a"]
    Ledger(path).append({"roi": "c", "status": "failed", "value": float("nan")})
    assert [r["roi"] for r in read_ledger(tmp_path)] == ["a", "c"]
    assert read_ledger(tmp_path)[-1]["value"] is None  # NaN is not JSON: written as null
    (line,) = path.read_text().splitlines()[2:]

    def refuse(name):  # strict JSON (RFC 8259): json.loads would accept NaN silently
        raise ValueError(f"not strict JSON: {name}")

    assert json.loads(line, parse_constant=refuse)["value"] is None


def test_ledger_read_again_gives_fresh_records_and_sees_every_change(tmp_path):
    path = tmp_path / LEDGER
    for k in range(12):  # a ledger of several records
        Ledger(path).append({"roi": f"r{k}", "status": "done", "quality": [{"sbr": k}]})
    first = read_ledger(tmp_path)
    first[0]["quality"][0]["sbr"] = -1  # a caller changing what it got
    again = read_ledger(tmp_path)
    assert again == [{"roi": f"r{k}", "status": "done", "quality": [{"sbr": k}]} for k in range(12)]
    text = path.read_text()
    path.write_text(text.replace('"r3", "status": "done"', '"r3", "status": "fail"'))  # same size
    assert read_ledger(tmp_path)[3]["status"] == "fail"
    path.write_text(text + '{"roi": "r12", "sta')  # a torn line is skipped as before
    assert len(read_ledger(tmp_path)) == 12


def test_sweep_removes_only_temporary_names(tmp_path):
    keep = [tmp_path / "roi_01.ome.tiff", tmp_path / "ledger.jsonl", tmp_path / ".hidden"]
    gone = [tmp_path / ".roi_01.ome.tiff.partial-123", tmp_path / ".quality.csv.partial-9"]
    for p in keep + gone:
        p.write_text("x")
    spill = tmp_path / ".roi_02.ome.tiff.spill-abc"
    (spill / "stack.zarr").mkdir(parents=True)
    assert sorted(sweep_leftovers(tmp_path)) == sorted(gone + [spill])
    assert all(p.exists() for p in keep)


def test_progress_lines_without_a_terminal(cohort, tmp_path, capsys):
    run_cohort(cohort / "cohort", tmp_path / "run", stains=cohort / "stains.csv", progress=True)
    err = capsys.readouterr().err.splitlines()
    done = [line for line in err if ": done in " in line]
    assert len(done) == 4
    assert all(line[:4].isdigit() and "left]" in line for line in done)


def test_progress_bar_on_a_terminal(cohort, tmp_path, monkeypatch):
    import io

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    screen = Terminal()
    monkeypatch.setattr(sys, "stderr", screen)
    run_cohort(cohort / "cohort", tmp_path / "run", stains=cohort / "stains.csv", progress=True)
    text = screen.getvalue()
    assert "washing" in text and "4/4" in text
    assert "roi_04: done" in text


def test_ome_zarr_output_and_resume(cohort, tmp_path):
    from plexwash.qc.io import sha256_path
    from plexwash.qc.recipe import default_recipe

    recipe = default_recipe().replace("output", format="ome-zarr")
    out = tmp_path / "run"
    summary = run_cohort(cohort / "cohort", out, recipe=recipe, stains=cohort / "stains.csv",
                         progress=False)
    assert summary.done == 4
    for rec in read_ledger(out):
        assert rec["output"].endswith(".ome.zarr") and (out / rec["output"]).is_dir()
        assert rec["output_sha256"] == sha256_path(out / rec["output"])
    assert run_cohort(cohort / "cohort", out, recipe=recipe, stains=cohort / "stains.csv",
                      progress=False).skipped == 4


def test_chunking_does_not_change_the_pixels(reference, cohort, tmp_path, monkeypatch):
    from plexwash.qc.io import roi as io_module
    from plexwash.qc.recipe import load_recipe

    monkeypatch.setattr(io_module, "LAZY_BYTES", 0)  # every ROI read lazily, as dask
    recipe = load_recipe(reference["out"] / "recipe.toml").replace("output", tile=64)
    out = tmp_path / "lazy"
    run_cohort(cohort / "cohort", out, recipe=recipe, spillover=cohort / "truth" / "spillover.csv",
               stains=cohort / "stains.csv", progress=False)
    names = _names(cohort)
    lazy, eager = _arrays(out, names), _arrays(reference["out"], names)
    for name in names:
        np.testing.assert_array_equal(lazy[name], eager[name])


# --------------------------------------------------------------------------- schedulers


def _start_scheduler(tmp_path):
    """A dask scheduler and one worker process on the loopback interface."""
    file = tmp_path / "scheduler.json"
    env = {**os.environ, "OMP_WAIT_POLICY": "PASSIVE"}
    scheduler = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
         "--port", "0", "--no-dashboard", "--scheduler-file", str(file)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    deadline = time.monotonic() + 60
    while not file.exists() and time.monotonic() < deadline:
        time.sleep(0.1)
    address = json.loads(file.read_text())["address"]
    worker = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
         "--nworkers", "1", "--host", "127.0.0.1", "--no-dashboard"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    return scheduler, worker, address


@pytest.mark.slow
def test_same_pixels_whatever_the_scheduler(reference, cohort, tmp_path):
    names = _names(cohort)
    expected = _arrays(reference["out"], names)
    spill = cohort / "truth" / "spillover.csv"
    local = tmp_path / "local"
    summary = run_cohort(cohort / "cohort", local, spillover=spill, stains=cohort / "stains.csv",
                         workers=2, progress=False)
    assert summary.done == 4
    scheduler, worker, address = _start_scheduler(tmp_path)
    try:
        assert address.startswith("tcp://127.0.0.1:")
        remote = tmp_path / "remote"
        summary = run_cohort(cohort / "cohort", remote, spillover=spill, stains=cohort / "stains.csv",
                             scheduler=address, progress=False)
        assert summary.done == 4
    finally:
        for process in (worker, scheduler):
            process.terminate()
            process.wait(timeout=30)
    for out in (local, remote):
        got = _arrays(out, names)
        for name in names:
            np.testing.assert_array_equal(got[name], expected[name])
        assert {r["pid"] for r in read_ledger(out)}.isdisjoint({os.getpid()})  # ran elsewhere
        assert quality_table(out) == quality_table(reference["out"])


# --------------------------------------------------------------------------- kill and interrupt


_DRIVER = BLOCKING_WRITE + textwrap.dedent("""
    import sys
    from plexwash.qc.io import roi as io
    from plexwash.qc.run import pool, run_cohort
    pool.POOL_ROI_BYTES = -1  # the hook is in this process: wash here (test_run_pool: workers)
    if sys.argv[5:] == ["lazy"]:  # every ROI read as dask: the staged wash
        io.LAZY_BYTES = 0
    try:
        s = run_cohort(sys.argv[1], sys.argv[2], spillover=sys.argv[3], stains=sys.argv[4],
                       progress=False)
    except KeyboardInterrupt:
        sys.exit(130)
    sys.exit(s.exit_code)
""")


@pytest.fixture(scope="module")
def bigger_cohort(tmp_path_factory, generator):
    """Eight ROIs large enough that a run takes a few seconds."""
    return _make_cohort(generator, tmp_path_factory.mktemp("bigger"), n_rois=8, size=256,
                        random_state=5)


def _start_driver(cohort, out, *, block, marker, lazy=False):
    """A run in a child process whose write of ROI ``block`` stops half way and waits."""
    env = {**os.environ, "OMP_WAIT_POLICY": "PASSIVE", "BLOCK_ROI": block,
           "BLOCK_MARKER": str(marker)}
    return subprocess.Popen(
        [sys.executable, "-c", _DRIVER, str(cohort / "cohort"), str(out),
         str(cohort / "truth" / "spillover.csv"), str(cohort / "stains.csv"),
         *(["lazy"] if lazy else [])],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _wait_for_blocked_write(marker: Path, process, timeout=300) -> Path:
    """The path of the half-written file, once the child's hook has blocked in the write.

    Polls for the hook's marker file; the timeout only bounds a broken run (the test
    then fails), no test result depends on it.
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if marker.exists() and marker.read_text():
            return Path(marker.read_text().split(" ", 1)[1])
        if process.poll() is not None:
            raise AssertionError(f"run ended before the blocked write: {process.communicate()}")
        time.sleep(0.02)
    process.kill()
    raise AssertionError("the run never reached the blocked write")


def _check_no_false_record(out):
    """Every done record's output exists and hashes as recorded; every output is readable."""
    latest = latest_records(read_ledger(out))
    for rec in latest.values():
        if rec["status"] == "done":
            assert rec["output_sha256"] == _sha256(out / rec["output"])
    for path in out.glob("*.ome.tiff"):
        np.asarray(read_roi(path).data)  # complete: a torn file would fail to read


@pytest.fixture(scope="module")
def bigger_reference(tmp_path_factory, bigger_cohort):
    out = tmp_path_factory.mktemp("bigger_reference")
    run_cohort(bigger_cohort / "cohort", out, spillover=bigger_cohort / "truth" / "spillover.csv",
               stains=bigger_cohort / "stains.csv", progress=False)
    return out


@pytest.mark.slow
@pytest.mark.parametrize("lazy", [False, True], ids=["in-memory", "staged"])
def test_kill_9_loses_only_the_rois_in_flight(bigger_cohort, bigger_reference, tmp_path, lazy):
    before = _hashes(bigger_cohort / "cohort")
    out = tmp_path / "run"
    marker = tmp_path / "blocked"
    process = _start_driver(bigger_cohort, out, block="roi_03", marker=marker, lazy=lazy)
    torn = _wait_for_blocked_write(marker, process)
    # a write is in flight: roi_03's temporary file exists, half written, not yet renamed
    assert torn.parent == out and torn.is_file() and torn.name != "roi_03.ome.tiff"
    assert not (out / "roi_03.ome.tiff").exists()
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=30)
    assert process.returncode == -signal.SIGKILL
    assert torn.is_file()  # the killed writer left its torn file behind
    _check_no_false_record(out)
    latest = latest_records(read_ledger(out))
    assert sorted(r for r, rec in latest.items() if rec["status"] == "done") == ["roi_01", "roi_02"]
    # plant a leftover of the other kind a killed writer leaves, to see it swept too
    (out / ".roi_08.ome.tiff.spill-zz" / "stack.zarr").mkdir(parents=True)
    summary = run_cohort(bigger_cohort / "cohort", out,
                         spillover=bigger_cohort / "truth" / "spillover.csv",
                         stains=bigger_cohort / "stains.csv", progress=False)
    assert (summary.done, summary.skipped, summary.failed) == (6, 2, 0)
    assert not torn.exists()
    assert not [p for p in out.iterdir() if p.name.startswith(".") and ("partial" in p.name
                                                                          or "spill" in p.name)]
    names = [f"roi_{k:02d}" for k in range(1, 9)]
    got, expected = _arrays(out, names), _arrays(bigger_reference, names)
    for name in names:
        np.testing.assert_array_equal(got[name], expected[name])
    assert _hashes(bigger_cohort / "cohort") == before


@pytest.mark.slow
@pytest.mark.parametrize("lazy", [False, True], ids=["in-memory", "staged"])
def test_ctrl_c_stops_cleanly(bigger_cohort, tmp_path, lazy):
    out = tmp_path / "run"
    marker = tmp_path / "blocked"
    process = _start_driver(bigger_cohort, out, block="roi_02", marker=marker, lazy=lazy)
    torn = _wait_for_blocked_write(marker, process)
    assert torn.is_file()  # roi_02 is being written when Ctrl-C comes
    process.send_signal(signal.SIGINT)
    process.wait(timeout=60)
    assert process.returncode == 130
    _check_no_false_record(out)
    records = read_ledger(out)
    assert [(r["roi"], r["status"]) for r in records] == [("roi_01", "done")]
    assert not torn.exists()  # the interrupted write cleaned up after itself
    assert {p.name for p in out.glob("*.ome.tiff")} == {"roi_01.ome.tiff"}
    assert not [p for p in out.iterdir() if p.name.startswith(".") and "plexwash-run" not in p.name]
    assert "interrupted" in (out / "run.log").read_text()


def test_run_summary_exit_codes():
    summary = RunSummary(Path("."), done=2, skipped=1, failed=0)
    assert (summary.exit_code, summary.total) == (0, 3)
    assert RunSummary(Path("."), 1, 0, 1, ("a",)).exit_code == 3
    assert math.isfinite(summary.seconds)


def test_run_demo_on_a_generated_stack(cohort, tmp_path):
    from plexwash.qc.run import run_demo
    from plexwash.qc.spillover import estimate_from_controls, read_spillover

    summary = run_demo(tmp_path / "demo", stack=cohort, progress=False)
    assert (summary.done, summary.exit_code) == (4, 0)
    used = read_spillover(tmp_path / "demo" / "spillover.csv")
    estimate = estimate_from_controls(cohort / "controls" / "controls.csv", stains=cohort / "stains.csv")
    np.testing.assert_allclose(used.values, estimate.values, rtol=1e-9, atol=1e-12)
    assert (tmp_path / "demo" / "report.html").is_file()
    with pytest.raises(InputError, match="demo data not found"):
        run_demo(tmp_path / "none", stack=tmp_path / "missing", progress=False)


def test_cancel_event_stops_after_the_roi_in_flight(tmp_path, monkeypatch):
    import threading

    import plexwash.qc.run.execute as run_module
    import plexwash.qc.run.pool as pool_module
    from plexwash.qc.io import write_ome_tiff

    cohort = tmp_path / "cohort"
    cohort.mkdir()
    stack = np.random.default_rng(3).poisson(2.0, (2, 48, 48)).astype(np.uint16)
    for name in ("a", "b", "c"):
        write_ome_tiff(cohort / f"{name}.ome.tiff", stack, ["Nd145", "Nd146"])
    cancel = threading.Event()
    real, started = run_module.wash_one, []

    def cancel_pressed_during_the_first(job):  # the hook: Cancel is pressed inside ROI "a"
        started.append(job.roi)
        if job.roi == "a":
            cancel.set()
        return real(job)

    monkeypatch.setattr(run_module, "wash_one", cancel_pressed_during_the_first)
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", -1)  # the hook is in this process: wash here
    with pytest.raises(KeyboardInterrupt):
        run_cohort(cohort, tmp_path / "run", progress=False, cancel=cancel)
    assert started == ["a"]  # the ROI in flight finished; no other began
    assert [(r["roi"], r["status"]) for r in read_ledger(tmp_path / "run")] == [("a", "done")]
    monkeypatch.setattr(run_module, "wash_one", real)
    summary = run_cohort(cohort, tmp_path / "run", progress=False)  # a rerun resumes
    assert (summary.done, summary.skipped) == (2, 1)


def test_staging_dir_is_passed_down_and_the_cli_reads_it_from_the_environment(tmp_path, monkeypatch):
    """``staging_dir`` reaches every staged wash of a run; the CLI (the only place that reads
    the environment) takes it from ``PLEXWASH_STAGING_DIR``."""
    from plexwash.qc.cli import main
    from plexwash.qc.io import roi as io_module
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.run import pool as pool_module
    from plexwash.qc.staging import Staging

    cohort = tmp_path / "cohort"
    cohort.mkdir()
    stack = np.random.default_rng(5).poisson(3.0, (2, 40, 40)).astype(np.uint16)
    for name in ("a", "b"):
        write_ome_tiff(cohort / f"{name}.ome.tiff", stack, ["Nd145", "Nd146"])
    folders = []

    class Recorded(Staging):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            folders.append(self.folder)

    monkeypatch.setattr(sys.modules["plexwash.qc.wash"], "Staging", Recorded)
    monkeypatch.setattr(io_module, "LAZY_BYTES", 0)  # read lazily: the wash stages on disk
    monkeypatch.setattr(pool_module, "POOL_ROI_BYTES", -1)  # the patches above are in this process
    scratch = tmp_path / "scratch"
    run_cohort(cohort, tmp_path / "api", progress=False, staging_dir=scratch)
    assert len(folders) == 2 and all(f.parent == scratch for f in folders)
    folders.clear()
    monkeypatch.setenv("PLEXWASH_STAGING_DIR", str(tmp_path / "from-env"))
    assert main(["run", str(cohort), "-o", str(tmp_path / "cli"), "--quiet"]) == 0
    assert len(folders) == 2 and all(f.parent == tmp_path / "from-env" for f in folders)
    assert list((tmp_path / "from-env").iterdir()) == []  # removed when each ROI is done
    folders.clear()
    monkeypatch.delenv("PLEXWASH_STAGING_DIR")
    assert main(["run", str(cohort), "-o", str(tmp_path / "beside"), "--quiet"]) == 0
    assert len(folders) == 2 and all(f.parent == tmp_path / "beside" for f in folders)


# --------------------------------------------------------------------------- quality without read-back


@pytest.mark.parametrize("lazy", [False, True])
def test_wash_to_file_hands_the_written_pixels_to_measure(cohort, tmp_path, lazy):
    """What the run measures as the washed stage is the output's pixels, without reading it back."""
    from plexwash.qc.wash import wash_to_file

    roi = read_roi(cohort / "cohort" / "roi_02.ome.tiff", stains=cohort / "stains.csv", lazy=lazy)
    seen = []
    result = wash_to_file(roi, tmp_path / "w.ome.tiff", spillover=cohort / "truth" / "spillover.csv",
                          measure=lambda washed: seen.append(np.array(washed[:])) or "measured")
    assert result.measured == "measured" and len(seen) == 1
    np.testing.assert_array_equal(seen[0], np.asarray(read_roi(result.output).data))


def test_ledger_quality_equals_the_quality_of_the_output_read_back(reference, cohort):
    from plexwash.qc.recipe import load_recipe
    from plexwash.qc.run import measure_quality
    from plexwash.qc.spillover import read_spillover

    out = reference["out"]
    recipe = load_recipe(out / "recipe.toml")
    matrix = read_spillover(out / "spillover.csv")
    for rec in read_ledger(out):
        roi = read_roi(cohort / "cohort" / f"{rec['roi']}.ome.tiff", stains=cohort / "stains.csv")
        raw_rows, washed_rows, _ = measure_quality(roi, out / rec["output"], recipe, matrix)
        assert json.loads(json.dumps(raw_rows + washed_rows)) == rec["quality"]


def test_package_imports_lazily_and_keeps_its_names():
    # ``import plexwash.qc`` and the run's resume path load no numerics up front (PEP 562
    # module __getattr__); every public name still resolves, ``plexwash.qc.wash`` stays the
    # function even once its submodule is loaded
    code = (
        "import sys, plexwash.qc as qc, plexwash.qc.quality as quality, plexwash.qc.run\n"
        "heavy = [m for m in ('numpy', 'scipy', 'numba', 'dask', 'matplotlib') if m in sys.modules]\n"
        "assert 'plexwash.qc.quality.stack' not in sys.modules\n"
        "import plexwash.qc.wash as module\n"
        "assert qc.wash is sys.modules['plexwash.qc.wash'].wash and callable(qc.wash)\n"
        "names = [getattr(qc, n) for n in qc.__all__] + [getattr(quality, n) for n in quality.__all__]\n"
        "assert quality.measure_stack is sys.modules['plexwash.qc.quality.stack'].measure_stack\n"
        "assert set(qc.__all__) <= set(dir(qc)) and set(quality.__all__) <= set(dir(quality))\n"
        "print(heavy)\n"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    # plexwash.qc.run needs the ledger and the plan only; its numerics load with the first wash
    assert result.stdout.split("\n")[0] in ("[]", "['numpy']"), result.stdout
    with pytest.raises(AttributeError):
        import plexwash.qc as qc

        qc.no_such_name  # noqa: B018


def test_json_ready_equals_the_plain_conversion():
    """The ledger's conversion (fast paths for plain Python values) gives what converting
    every value by its kind gives, on nested records of every kind of value."""
    from plexwash.qc.ledger import json_ready

    def plain(value):
        if isinstance(value, dict):
            return {str(k): plain(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [plain(v) for v in value]
        if isinstance(value, np.ndarray):
            return plain(value.tolist())
        if isinstance(value, (bool, np.bool_)):
            return bool(value)
        if isinstance(value, (int, np.integer)):
            return int(value)
        if isinstance(value, (float, np.floating)):
            return float(value) if math.isfinite(value) else None
        if isinstance(value, Path):
            return str(value)
        return value

    rng = np.random.default_rng(4)
    leaves = [None, True, np.bool_(False), 3, np.int64(-2), np.uint8(7), 1.5, np.float32(0.1),
              np.float64(np.inf), float("nan"), -float("inf"), "text", Path("/a/b"),
              np.array([[1.0, np.nan], [2.0, 3.0]], np.float32), np.array([True, False])]
    for _ in range(50):
        record = {"roi": "r", 2: [tuple(leaves[i] for i in rng.integers(0, len(leaves), 4))],
                  "rows": [{"k": leaves[i], 5: {"x": leaves[j]}} for i, j in rng.integers(0, len(leaves), (6, 2))]}
        got = json_ready(record)
        want = plain(record)
        assert got == want and json.dumps(got) == json.dumps(want)
        assert [type(v) for v in got["2"][0]] == [type(v) for v in want["2"][0]]


def test_run_files_are_parsed_once_while_they_stay_the_same(tmp_path):
    """The recipe, stain sheet and matrix of a run are parsed once per process; a file that
    changes (size or modification time) is parsed again, and a missing one gives the
    loader's own error."""
    from plexwash.qc.run import execute

    calls = []

    def load(path):
        calls.append(path)
        return Path(path).read_text()

    path = tmp_path / "a.txt"
    path.write_text("one")
    assert execute._once(path, load) == "one" and execute._once(path, load) == "one"
    assert len(calls) == 1
    path.write_text("three")
    os.utime(path, ns=(1, 1))
    assert execute._once(path, load) == "three" and len(calls) == 2
    with pytest.raises(FileNotFoundError):
        execute._once(tmp_path / "missing.txt", load)


def test_csv_cells_fast_path_writes_the_same_text():
    # quality.csv's cells go through a fast path for plain floats, text and None; the
    # text must be that of the general conversion (_csv_cell) for every kind of value.
    from plexwash.qc.files import _csv_cell, _csv_cell_fast, csv_text

    class Text(str):
        pass

    rng = np.random.default_rng(3)
    values = [None, "", "abc", Text("x"), 0.0, -0.0, 1.5, 1e-300, 5e-324, math.inf, -math.inf,
              math.nan, 1.7976931348623157e308, True, False, 0, 7, -3, [1, 2.5, "a"], ("x",), [],
              np.float64(2.5), np.float32(1.25), np.int64(4), np.float64("inf"), np.bool_(True)]
    values += [float(v) for v in rng.normal(size=500) * 10.0 ** rng.integers(-300, 300, 500)]
    for value in values:
        assert _csv_cell_fast(value) == _csv_cell(value), value
    rows = [{"a": v, "b": "t"} for v in values] + [{"b": 1.0}]
    # no cell here holds a comma or a quote, so the CSV text is the cells joined
    expected = "a,b\n" + "".join(f"{_csv_cell(r.get('a'))},{_csv_cell(r.get('b'))}\n" for r in rows)
    assert csv_text(["a", "b"], rows) == expected
