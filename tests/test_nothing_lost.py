"""Nothing the user gave is ever overwritten, deleted or left stale: a fuzz suite of bad inputs and faults.

Every case runs the CLI (in process through ``plexwash.qc.cli.main``; in a subprocess only
where a signal or a second process is needed) and checks the contract of README "What
plexwash will never do": the exit code; exactly one line on stderr, naming the file, no
traceback; every input file (and every file reached through one: controls listed in a
controls CSV, the ROIs of a run's ledger, a recipe's spillover matrix) byte-identical by
SHA-256; no temporary file left anywhere; and for exit 2 nothing written at all.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
from plexwash.qc.cli import main
from plexwash.qc.files import is_temporary, temporary_path
from plexwash.qc.io import write_ome_tiff, write_ome_zarr
from plexwash.qc.run import LEDGER, read_ledger

CHANNELS = ["Nd145", "Nd146", "Nd148"]


# --------------------------------------------------------------------------- helpers


def _user_tiff(path: Path, data: np.ndarray, names=CHANNELS) -> Path:
    """An OME-TIFF as another program writes it (not plexwash: no plexwash Software tag)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": list(names)}})
    return path


def _stack(seed=0, shape=(3, 40, 40), dtype=np.float32) -> np.ndarray:
    rng = np.random.default_rng(seed)
    data = rng.poisson(0.3, shape).astype(dtype)
    data[:, 10:20, 10:20] += rng.poisson(30, (shape[0], 10, 10)).astype(dtype)
    return data


def _snapshot(root: Path) -> dict[str, str]:
    """SHA-256 of every file under ``root`` (and a marker for every folder)."""
    out = {}
    for path in sorted(root.rglob("*")):
        rel = path.relative_to(root).as_posix()
        if path.is_symlink():
            out[rel] = "link:" + os.readlink(path)
        elif path.is_dir():
            out[rel] = "dir"
        else:
            out[rel] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


def _leftovers(root: Path) -> list[str]:
    return [p.as_posix() for p in root.rglob("*") if is_temporary(p)]


def _cli(capsys, *args) -> tuple[int, str, str]:
    capsys.readouterr()
    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:  # argparse usage errors
        code = exc.code
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _one_line(err: str, names) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("error: ") and "Traceback" not in err, err
    for name in names:
        assert str(name) in lines[0], (name, lines[0])
    return lines[0]


@pytest.fixture
def world(tmp_path):
    """A user's folder: a cohort, controls, a spillover matrix, a recipe and a finished run."""
    inp = tmp_path / "in"
    cohort = inp / "cohort"
    for i in range(2):
        _user_tiff(cohort / f"roi_{i + 1:02d}.ome.tiff", _stack(i))
    controls = inp / "controls"
    for i, name in enumerate(CHANNELS):
        data = np.random.default_rng(10 + i).poisson(0.2, (3, 40, 40)).astype(np.float32)
        data[i, 5:35, 5:35] += 50
        if i == 0:
            data[1, 5:35, 5:35] += 1.5  # Nd145 -> Nd146 (M+1)
        _user_tiff(controls / f"{name}.ome.tiff", data)
    (controls / "controls.csv").write_text("file,channel\n" + "".join(f"{c}.ome.tiff,{c}\n" for c in CHANNELS))
    (inp / "spill.csv").write_text(",Nd145,Nd146,Nd148\nNd145,1,0.03,0\nNd146,0,1,0\nNd148,0,0,1\n")
    (inp / "recipe.toml").write_text('[compensation]\nspillover = "spill.csv"\n')
    (inp / "notes.html").write_text("<html>my own notes</html>\n")
    (inp / "mine.csv").write_text("a,b\n1,2\n")
    (inp / "mine.toml").write_text("# my settings\nx = 1\n")
    (inp / "mine.ome.tiff").write_bytes((cohort / "roi_02.ome.tiff").read_bytes())
    user_zarr = inp / "mine.ome.zarr"
    user_zarr.mkdir()
    (user_zarr / "thesis.txt").write_text("only copy\n")
    return tmp_path


def _run_folder(world: Path, capsys) -> Path:
    out = world / "run"
    code, _, err = _cli(capsys, "run", world / "in" / "cohort", "-o", out, "--quiet")
    assert code == 0, err
    return out


def _check_exit_2(world: Path, before: dict, code: int, err: str, names) -> None:
    assert code == 2, err
    _one_line(err, names)
    assert _snapshot(world) == before  # nothing written, nothing changed
    assert not _leftovers(world)


# --------------------------------------------------------------------------- bad input files


def _bad_file(kind: str, folder: Path) -> tuple[Path, list]:
    """A bad ROI of ``kind`` and extra command-line arguments; returns (path, args)."""
    path = folder / f"{kind}.ome.tiff"
    good = _stack(3)
    if kind == "empty":
        path.write_bytes(b"")
    elif kind == "text":
        path.write_text("not an image\n")
    elif kind == "truncated":
        _user_tiff(path, good)
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    elif kind == "nan":
        good[0, 1, 1] = np.nan
        _user_tiff(path, good)
    elif kind == "negative_float":
        _user_tiff(path, good - 1.0)  # an offset
    elif kind == "negative_int16":
        _user_tiff(path, good.astype(np.int16) - 3)  # signed integers
    elif kind in ("absurd_2e6", "absurd_1e8"):
        size = 2_000_000 if kind == "absurd_2e6" else 100_000_000
        _user_tiff(path, good)
        xml = tifffile.TiffFile(path).ome_metadata.replace('SizeX="40" SizeY="40"',
                                                           f'SizeX="{size}" SizeY="{size}"')
        tifffile.imwrite(path, good, description=xml, metadata=None, photometric="minisblack")
    elif kind == "absurd_zarr":
        path = folder / "absurd.ome.zarr"
        write_ome_zarr(path, good, CHANNELS)
        meta = json.loads((path / "0" / "zarr.json").read_text())
        meta["shape"] = [3, 100_000_000, 100_000_000]
        (path / "0" / "zarr.json").write_text(json.dumps(meta))
    elif kind == "zarr_no_multiscales":
        path = folder / "bare.ome.zarr"
        write_ome_zarr(path, good, CHANNELS)
        meta = json.loads((path / "zarr.json").read_text())
        meta["attributes"] = {}
        (path / "zarr.json").write_text(json.dumps(meta))
    elif kind == "one_px":
        _user_tiff(path, np.ones((3, 1, 1), np.float32))
    elif kind == "three_px":
        write_ome_tiff(path, np.ones((3, 3, 3), np.float32), CHANNELS)
    elif kind == "plain_no_stains":
        path = folder / "plain.tiff"
        tifffile.imwrite(path, good, photometric="minisblack")
    elif kind == "duplicate_names":
        _user_tiff(path, good, ["Nd145", "Nd145", "Nd148"])
    elif kind == "missing":
        pass
    elif kind == "plain_folder":
        path = folder / "folder.ome.tiff"
        path.mkdir()
    else:  # pragma: no cover
        raise ValueError(kind)
    return path


BAD_FILES = ["empty", "text", "truncated", "nan", "negative_float", "negative_int16", "absurd_2e6",
             "absurd_1e8", "absurd_zarr", "zarr_no_multiscales", "one_px", "three_px",
             "plain_no_stains", "duplicate_names", "missing", "plain_folder"]


@pytest.mark.parametrize("kind", BAD_FILES)
def test_bad_input_file_is_refused_naming_it(kind, world, capsys):
    bad = _bad_file(kind, world / "in")
    before = _snapshot(world)
    code, _, err = _cli(capsys, "wash", bad, "-o", world / "out" / "washed.ome.tiff")
    _check_exit_2(world, before, code, err, [bad.name])
    if kind.startswith("negative"):
        assert "negative" in err and "%" in err  # the fraction of negative pixels
    if kind == "one_px" or kind == "three_px":
        assert "stack" not in err and "speckle.radius:" not in err


# --------------------------------------------------------------------------- outputs that would hit an input


def _case(kind: str, world: Path, capsys):
    """Command line of a ``kind`` of output that must be refused, and the name the error must hold."""
    inp = world / "in"
    roi = inp / "cohort" / "roi_01.ome.tiff"
    controls = inp / "controls" / "controls.csv"
    control = inp / "controls" / "Nd146.ome.tiff"
    if kind == "spill_output_is_a_control":
        return ["spill", "controls", controls, "-o", control], control.name
    if kind == "spill_output_csv_is_a_control_listed":
        listed = inp / "controls" / "listed.csv"
        listed.write_text("x\n")
        controls.write_text(controls.read_text() + "listed.csv,Nd145\n")
        return ["spill", "controls", controls, "-o", listed], listed.name
    if kind == "spill_heatmap_is_a_control":
        return ["spill", "controls", controls, "-o", world / "s.csv", "--heatmap", control], control.name
    if kind == "spill_output_is_the_controls_csv":
        return ["spill", "controls", controls, "-o", controls], controls.name
    if kind == "spill_interval_would_hit_an_input":
        (inp / "controls" / "s.low.csv").write_text(",a\na,1\n")
        controls.write_text(controls.read_text() + "s.low.csv,Nd145\n")
        return ["spill", "controls", controls, "-o", inp / "controls" / "s.csv"], "s.low.csv"
    if kind == "spill_output_is_a_user_csv":
        return ["spill", "controls", controls, "-o", inp / "mine.csv"], "mine.csv"
    if kind == "spill_tissue_output_is_the_stains":
        stains = inp / "stains.csv"
        stains.write_text("tag,marker,wash\n" + "".join(f"{c},{c},yes\n" for c in CHANNELS))
        return ["spill", "tissue", roi, "--stains", stains, "-o", stains], "stains.csv"
    if kind == "report_output_is_a_run_input":
        _run_folder(world, capsys)
        return ["report", world / "run", "-o", roi], roi.name
    if kind == "report_wrong_extension":
        _run_folder(world, capsys)
        return ["report", world / "run", "-o", world / "report.txt"], "report.txt"
    if kind == "report_over_a_user_html":
        _run_folder(world, capsys)
        return ["report", world / "run", "-o", inp / "notes.html"], "notes.html"
    if kind == "recipe_output_is_its_spillover":
        return ["recipe", "new", "--spillover", inp / "spill.csv", "-o", inp / "spill.csv"], "spill.csv"
    if kind == "recipe_over_a_user_toml":
        return ["recipe", "new", "-o", inp / "mine.toml"], "mine.toml"
    if kind == "wash_over_a_user_zarr_folder":
        return ["wash", roi, "-o", inp / "mine.ome.zarr"], "mine.ome.zarr"
    if kind == "wash_into_zarr_holding_the_input":
        holder = inp / "holder.ome.zarr"
        holder.mkdir()
        inner = _user_tiff(holder / "raw.ome.tiff", _stack(5))
        return ["wash", inner, "-o", holder], "holder.ome.zarr"
    if kind == "wash_output_is_the_input":
        return ["wash", roi, "-o", roi], roi.name
    if kind == "wash_output_links_to_the_input":
        link = inp / "link.ome.tiff"
        link.symlink_to(roi)
        return ["wash", roi, "-o", link], "link.ome.tiff"
    if kind == "wash_output_hardlinks_the_input":
        hard = inp / "hard.ome.tiff"
        os.link(roi, hard)
        return ["wash", roi, "-o", hard], "hard.ome.tiff"
    if kind == "wash_output_is_its_recipes_spillover":
        return ["wash", roi, "--recipe", inp / "recipe.toml", "-o", inp / "spill.csv"], "spill.csv"
    if kind == "wash_over_a_user_tiff":
        return ["wash", roi, "-o", inp / "mine.ome.tiff"], "mine.ome.tiff"
    if kind == "wash_wrong_extension":
        return ["wash", roi, "-o", world / "washed.png"], "washed.png"
    if kind == "run_into_the_cohort":
        return ["run", inp / "cohort", "-o", inp / "cohort", "--quiet"], "cohort"
    if kind == "run_inside_the_cohort":
        return ["run", inp / "cohort", "-o", inp / "cohort" / "run", "--quiet"], "cohort"
    if kind == "run_folder_holding_the_cohort":
        return ["run", inp / "cohort", "-o", inp, "--quiet"], "in"
    if kind == "run_over_a_user_recipe_file":
        out = world / "shared"
        out.mkdir()
        (out / "recipe.toml").write_text("# someone's notes, not a plexwash recipe\n")
        return ["run", inp / "cohort", "-o", out, "--quiet"], "recipe.toml"
    if kind == "run_over_a_user_stack":
        out = world / "shared"
        _user_tiff(out / "roi_01.ome.tiff", _stack(7))
        return ["run", inp / "cohort", "-o", out, "--quiet"], "roi_01.ome.tiff"
    raise ValueError(kind)  # pragma: no cover


OUTPUT_CASES = [
    "spill_output_is_a_control", "spill_output_csv_is_a_control_listed", "spill_heatmap_is_a_control",
    "spill_output_is_the_controls_csv", "spill_interval_would_hit_an_input", "spill_output_is_a_user_csv",
    "spill_tissue_output_is_the_stains", "report_output_is_a_run_input", "report_wrong_extension",
    "report_over_a_user_html", "recipe_output_is_its_spillover", "recipe_over_a_user_toml",
    "wash_over_a_user_zarr_folder", "wash_into_zarr_holding_the_input", "wash_output_is_the_input",
    "wash_output_links_to_the_input", "wash_output_hardlinks_the_input",
    "wash_output_is_its_recipes_spillover", "wash_over_a_user_tiff", "wash_wrong_extension",
    "run_into_the_cohort", "run_inside_the_cohort", "run_folder_holding_the_cohort",
    "run_over_a_user_recipe_file", "run_over_a_user_stack",
]


@pytest.mark.parametrize("kind", OUTPUT_CASES)
def test_an_output_never_touches_an_input_or_a_file_plexwash_did_not_write(kind, world, capsys):
    args, name = _case(kind, world, capsys)
    before = _snapshot(world)
    code, _, err = _cli(capsys, *args)
    _check_exit_2(world, before, code, err, [name])


def test_own_outputs_are_replaced(world, capsys):
    """The other side of the rule: what plexwash wrote, it may write again."""
    inp = world / "in"
    roi = inp / "cohort" / "roi_01.ome.tiff"
    for args in (["wash", roi, "-o", world / "w.ome.tiff"], ["wash", roi, "-o", world / "w.ome.zarr"],
                 ["recipe", "new", "-o", world / "r.toml"],
                 ["spill", "controls", inp / "controls" / "controls.csv", "-o", world / "s.csv",
                  "--heatmap", world / "s.png"]):
        for _ in range(2):
            code, _, err = _cli(capsys, *args)
            assert code == 0, err
    out = _run_folder(world, capsys)
    for _ in range(2):
        code, _, err = _cli(capsys, "report", out, "-o", world / "again.html")
        assert code == 0, err
    assert not _leftovers(world)


# --------------------------------------------------------------------------- faults and stale results


def _fault(kind: str, world: Path, capsys):
    """Set up and run one fault; return (exit code, stderr, names the line must hold)."""
    inp = world / "in"
    if kind == "unreachable_scheduler":
        out = world / "run"
        code, _, err = _cli(capsys, "run", inp / "cohort", "-o", out, "--scheduler", "tcp://127.0.0.1:9",
                            "--connect-timeout", "1", "--quiet")
        assert not out.exists()  # nothing written: not even the folder
        return code, err, ["tcp://127.0.0.1:9"]
    if kind == "file_given_as_cohort":
        roi = inp / "cohort" / "roi_01.ome.tiff"
        code, _, err = _cli(capsys, "run", roi, "-o", world / "run", "--quiet")
        assert "is a file" in err
        return code, err, [roi.name]
    if kind == "bad_recipe_key":
        (inp / "bad.toml").write_text("[speckle]\nradios = 3\n")
        code, _, err = _cli(capsys, "wash", inp / "cohort" / "roi_01.ome.tiff", "--recipe", inp / "bad.toml",
                            "-o", world / "w.ome.tiff")
        return code, err, ["bad.toml", "radios"]
    if kind == "bad_spillover_value":
        (inp / "badspill.csv").write_text(",Nd145,Nd146\nNd145,1,x\nNd146,0,1\n")
        code, _, err = _cli(capsys, "run", inp / "cohort", "-o", world / "run", "--spillover",
                            inp / "badspill.csv", "--quiet")
        return code, err, ["badspill.csv"]
    if kind == "stains_mismatch":
        (inp / "stains.csv").write_text("tag,marker,wash\nNd145,a,yes\n")
        code, _, err = _cli(capsys, "inspect", inp / "cohort" / "roi_01.ome.tiff", "--stains", inp / "stains.csv")
        return code, err, ["stains.csv"]
    raise ValueError(kind)  # pragma: no cover


FAULTS = ["unreachable_scheduler", "file_given_as_cohort", "bad_recipe_key", "bad_spillover_value",
          "stains_mismatch"]


@pytest.mark.parametrize("kind", FAULTS)
def test_a_fault_ends_with_one_clear_line(kind, world, capsys):
    before = _snapshot(world / "in")
    code, err, names = _fault(kind, world, capsys)
    assert code == 2, err
    _one_line(err, names)
    after = _snapshot(world / "in")
    assert {k: after[k] for k in before} == before  # inputs byte-identical
    assert not _leftovers(world)


def test_a_failed_redo_removes_its_stale_output(world, capsys):
    out = _run_folder(world, capsys)
    roi = world / "in" / "cohort" / "roi_02.ome.tiff"
    assert (out / "roi_02.ome.tiff").exists()
    roi.write_bytes(roi.read_bytes()[:300])  # changed, and now unreadable: the redo fails
    code, _, err = _cli(capsys, "run", world / "in" / "cohort", "-o", out, "--quiet")
    assert code == 3 and err == ""
    assert not (out / "roi_02.ome.tiff").exists() and (out / "roi_01.ome.tiff").exists()
    last = read_ledger(out)[-1]
    assert last["roi"] == "roi_02" and last["status"] == "failed"
    assert last["stale_output_removed"] == "roi_02.ome.tiff"
    assert "truncated" in last["error"] and "roi_02.ome.tiff" in last["error"]
    assert not _leftovers(world)


def test_a_torn_ledger_line_is_dropped_on_resume(world, capsys):
    out = _run_folder(world, capsys)
    with open(out / LEDGER, "a") as fh:
        fh.write('{"roi": "roi_01", "status": "do')  # killed mid-line
    complete = (out / LEDGER).read_text().splitlines()[:-1]
    code, _, err = _cli(capsys, "run", world / "in" / "cohort", "-o", out, "--quiet")
    assert code == 0, err
    lines = (out / LEDGER).read_text().splitlines()
    assert lines == complete  # every complete record kept, the torn line gone, nothing redone
    assert all(isinstance(json.loads(line), dict) for line in lines)  # what jq needs


def test_leftovers_of_every_writer_are_swept_by_the_next_run(world, capsys):
    out = _run_folder(world, capsys)
    made = [temporary_path(out / "spillover.csv"), temporary_path(out / "report.html"),
            temporary_path(out / "roi_01.ome.tiff", "measure"), temporary_path(out / "x", "probe")]
    for path in made:
        path.write_text("half")
    staging = temporary_path(out / "roi_02.ome.tiff", "spill")
    (staging / "stack.zarr").mkdir(parents=True)
    code, _, err = _cli(capsys, "run", world / "in" / "cohort", "-o", out, "--quiet")
    assert code == 0, err
    assert not _leftovers(world)


def test_outputs_follow_the_umask(world, capsys):
    old = os.umask(0o022)
    try:
        code, _, err = _cli(capsys, "spill", "controls", world / "in" / "controls" / "controls.csv",
                            "-o", world / "s.csv", "--heatmap", world / "s.png")
        assert code == 0, err
        code, _, err = _cli(capsys, "recipe", "new", "-o", world / "r.toml")
        assert code == 0, err
    finally:
        os.umask(old)
    for name in ("s.csv", "s.low.csv", "s.high.csv", "s.png", "r.toml"):
        assert (world / name).stat().st_mode & 0o777 == 0o644, name


def test_messages_name_the_file(world, capsys):
    inp = world / "in"
    # a one-channel stack is a stack with one channel, not a "2-D image"
    one = _user_tiff(inp / "one.ome.tiff", _stack(4)[:1], ["Nd145"])
    code, out, err = _cli(capsys, "wash", one, "-o", world / "one_washed.ome.tiff")
    assert code == 0, err
    # -o into a new folder given with a trailing slash
    roi = inp / "cohort" / "roi_01.ome.tiff"
    code, out, err = _cli(capsys, "wash", roi, "-o", f"{world / 'newdir'}/")
    assert code == 0, err
    assert (world / "newdir" / "roi_01.ome.tiff").is_file()


def test_removed_fractions_stay_within_0_and_100_percent(world, capsys):
    out = world / "run"
    code, printed, err = _cli(capsys, "run", world / "in" / "cohort", "-o", out, "--quiet",
                              "--spillover", world / "in" / "spill.csv")
    assert code == 0, err
    records = read_ledger(out)
    assert {"hot_pixels", "compensation", "speckle"} <= set(records[0]["removed_fraction"])
    for record in records:
        for values in record["removed_fraction"].values():
            assert all(0.0 <= v <= 1.0 for v in values.values() if v is not None)
    code, printed, err = _cli(capsys, "wash", world / "in" / "cohort" / "roi_01.ome.tiff", "-o",
                              world / "w.ome.tiff", "--spillover", world / "in" / "spill.csv")
    assert code == 0, err
    percents = [float(p) for p in re.findall(r"(-?[0-9.]+) %", printed)]
    assert percents and all(0.0 <= p <= 100.0 for p in percents), printed


# --------------------------------------------------------------------------- a full disk


@pytest.fixture
def small_disk(tmp_path):
    """A 300 KiB tmpfs (needs root and mount(8)); skipped where none can be mounted."""
    mount = tmp_path / "disk"
    mount.mkdir()
    if shutil.which("mount") is None:
        pytest.skip("no mount(8) on this machine: cannot make a small full disk")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=300k", "tmpfs", str(mount)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({done.stderr.strip() or 'not root'})")
    try:
        yield mount
    finally:
        subprocess.run(["umount", "-l", str(mount)], capture_output=True)


def _fill(disk: Path) -> None:
    """Fill the disk to the last byte."""
    fd = os.open(disk / "filler", os.O_WRONLY | os.O_CREAT | os.O_APPEND)
    try:
        for size in (65536, 4096, 512, 1):
            try:
                while True:
                    os.write(fd, b"\0" * size)
            except OSError:
                pass
    finally:
        os.close(fd)


DISK_FULL = ["wash", "report", "recipe", "spill", "run"]


@pytest.mark.parametrize("command", DISK_FULL)
def test_a_full_disk_ends_with_one_line_and_no_partial_file(command, world, small_disk, capsys):
    inp = world / "in"
    roi = inp / "cohort" / "roi_01.ome.tiff"
    if command in ("report", "run"):
        out = small_disk / "run"
        code, _, err = _cli(capsys, "run", inp / "cohort", "-o", out, "--quiet")
        assert code == 0, err
    if command == "run":  # a changed input is redone on a full disk: recorded failed, exit 3
        noise = np.random.default_rng(11).uniform(0, 100, (3, 40, 40)).astype(np.float32)
        _user_tiff(roi, noise)  # 19 KB that no compressor packs into the 8 KB left
    before = _snapshot(inp)
    _fill(small_disk)
    if command == "run":  # room for a ledger record and log lines, none for a washed stack
        filler = small_disk / "filler"
        os.truncate(filler, filler.stat().st_size - 8192)
    target = {"wash": small_disk / "w.ome.tiff", "report": small_disk / "again.html",
              "recipe": small_disk / "r.toml", "spill": small_disk / "s.csv", "run": small_disk / "run"}[command]
    args = {"wash": ["wash", roi, "-o", target], "report": ["report", small_disk / "run", "-o", target],
            "recipe": ["recipe", "new", "-o", target],
            "spill": ["spill", "controls", inp / "controls" / "controls.csv", "-o", target],
            "run": ["run", inp / "cohort", "-o", target, "--quiet"]}[command]
    code, _, err = _cli(capsys, *args)
    line = _one_line(err, [])
    assert "no space left on device" in line and "Errno" not in line
    if command == "run":  # the failure is recorded, so the exit code is the run's: 3
        last = read_ledger(target)[-1]
        assert (last["roi"], last["status"]) == ("roi_01", "failed"), last
        assert "no space left on device" in last["error"] and "Errno" not in last["error"]
        assert code == 3, err
    else:
        assert code == 1 and str(target) in line, err
    assert _snapshot(inp) == before
    assert not _leftovers(world) and not _leftovers(small_disk)


# --------------------------------------------------------------------------- a killed run


def test_kill_9_then_resume_leaves_nothing_behind(world, tmp_path):
    out = tmp_path / "run"
    cohort = world / "in" / "cohort"
    before = _snapshot(world / "in")
    command = [sys.executable, "-c", "from plexwash.qc.cli import main; import sys; sys.exit(main())",
               "run", str(cohort), "-o", str(out), "--quiet"]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    for _ in range(1500):  # until a temporary exists (a write in flight) or the run ends
        if process.poll() is not None or (out.exists() and _leftovers(out)):
            break
        time.sleep(0.01)
    process.kill()
    process.wait()
    done = subprocess.run(command, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""
    assert _snapshot(world / "in") == before
    assert not _leftovers(tmp_path)
    assert all(isinstance(json.loads(line), dict) for line in (out / LEDGER).read_text().splitlines())
