"""The plexwash command: contract output, exit codes, one-line errors, nothing written on bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile
from plexwash.qc.cli import main
from plexwash.qc.io import write_ome_tiff

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "example_stack"


def run_cli(*args, cwd=None):
    """The console entry point in a subprocess, as a user runs it."""
    return subprocess.run([sys.executable, "-m", "plexwash.qc.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=300)


def assert_one_line_error(result, *fragments, code=2):
    assert result.returncode == code, (result.returncode, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error: ")
    assert "Traceback" not in result.stderr
    for fragment in fragments:
        assert fragment in lines[0], lines[0]


def test_version():
    result = run_cli("--version")
    assert result.returncode == 0
    from plexwash.qc import __version__

    assert result.stdout.strip() == f"plexwash {__version__}"


def test_inspect_json_follows_contract_and_flags_failed_stain(generator, tmp_path):
    """An ROI the suite has never seen: another random state, size and channel order."""
    rng = np.random.default_rng(4242)
    names = ["Nd150", "Sm152", "Nd148", "Gd158", "Eu151", "Ir191", "Sm149", "Gd160"]
    stains = generator.random_stains(names, rng, failed="Gd158", dim="Eu151")
    spill = generator.build_spillover(names, rng)
    counts, truth = generator.simulate_roi(rng, stains, spill, (300, 260))
    path = tmp_path / "unseen.ome.tiff"
    generator.write_ome_tiff(path, counts, names)
    result = run_cli("inspect", path, "--json")
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["roi"] == "unseen"
    assert [c["name"] for c in doc["channels"]] == names  # channel order as in the file
    for channel in doc["channels"]:
        assert {"name", "sbr", "snr", "flags"} <= set(channel)
        assert isinstance(channel["flags"], list)
    flags = {c["name"]: c["flags"] for c in doc["channels"]}
    assert "empty" in flags["Gd158"]
    good = [n for n in names if n != "Gd158"]
    assert all("empty" not in flags[n] for n in good), flags


def test_inspect_table_is_readable(tmp_path):
    result = run_cli("inspect", DEMO / "cohort" / "roi_01.ome.tiff", "--stains", DEMO / "stains.csv")
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[0].startswith("ROI roi_01")
    assert "SBR" in lines[1] and "flags" in lines[1]
    assert any(line.startswith("Tb159") and "empty" in line for line in lines)
    assert any(line.startswith("Nd143") and line.rstrip().endswith("ok") for line in lines)


def test_inspect_uses_recipe_thresholds(tmp_path):
    recipe = tmp_path / "strict.toml"
    recipe.write_text("[quality]\nlow_sbr = 100000.0\n")
    result = run_cli("inspect", DEMO / "cohort" / "roi_01.ome.tiff", "--recipe", recipe, "--json")
    assert result.returncode == 0, result.stderr
    doc = json.loads(result.stdout)
    assert all("low-sbr" in c["flags"] for c in doc["channels"])


def test_recipe_new_writes_commented_default(tmp_path):
    out = tmp_path / "recipe.toml"
    assert main(["recipe", "new", "-o", str(out)]) == 0
    text = out.read_text()
    assert text.startswith("# plexwash recipe")
    from plexwash.qc.recipe import default_recipe, load_recipe

    assert load_recipe(out).sha256() == default_recipe().sha256()


def test_recipe_new_with_spillover_records_relative_path(tmp_path):
    spill = DEMO / "truth" / "spillover.csv"
    out = tmp_path / "r.toml"
    assert main(["recipe", "new", "-o", str(out), "--spillover", str(spill)]) == 0
    from plexwash.qc.recipe import load_recipe

    assert load_recipe(out).spillover_path().resolve() == spill.resolve()


def test_wash_writes_ome_tiff_with_channel_names(tmp_path):
    out = tmp_path / "washed.ome.tiff"
    result = run_cli("wash", DEMO / "cohort" / "roi_03.ome.tiff", "-o", out,
                     "--spillover", DEMO / "truth" / "spillover.csv")
    assert result.returncode == 0, result.stderr
    assert "compensation" in result.stdout and "speckle" in result.stdout
    with tifffile.TiffFile(out) as tif:
        import ome_types  # outside reader of the OME-XML

        # validated against the OME 2016-06 XML schema (ome_types, validate=True)
        ome = ome_types.from_xml(tif.ome_metadata, validate=True)
        names = [c.name for c in ome.images[0].pixels.channels]
        assert ome.images[0].pixels.physical_size_x == pytest.approx(1.0)
        data = tif.asarray()
    raw = tifffile.imread(DEMO / "cohort" / "roi_03.ome.tiff")
    assert data.shape == raw.shape and data.dtype == np.float32
    assert names == [line.split(",")[0] for line in (DEMO / "stains.csv").read_text().splitlines()[1:]]
    assert data.sum() < raw.sum()


def test_wash_into_folder_and_zarr(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    assert main(["wash", str(DEMO / "cohort" / "roi_03.ome.tiff"), "-o", str(folder)]) == 0
    assert (folder / "roi_03.ome.tiff").exists()
    zarr_out = tmp_path / "w.ome.zarr"
    assert main(["wash", str(DEMO / "cohort" / "roi_03.ome.tiff"), "-o", str(zarr_out)]) == 0
    from plexwash.qc.io import read_roi

    a = read_roi(folder / "roi_03.ome.tiff").data
    b = np.asarray(read_roi(zarr_out).data)
    np.testing.assert_array_equal(a, b)


def _no_new_files(folder: Path, before: set) -> None:
    assert {p.name for p in folder.iterdir()} == before


def test_bad_inputs_give_one_line_and_write_nothing(tmp_path):
    good = tmp_path / "good.ome.tiff"
    write_ome_tiff(good, np.ones((2, 16, 16), np.float32), ["Nd145", "Nd146"])
    bad_recipe = tmp_path / "bad.toml"
    bad_recipe.write_text("[speckle]\nradius = -1\n")
    unknown = tmp_path / "unknown.toml"
    unknown.write_text("[speckle]\nwindow = 3\n")
    truncated = tmp_path / "cut.ome.tiff"
    truncated.write_bytes(good.read_bytes()[:400])
    before = {p.name for p in tmp_path.iterdir()}
    cases = [
        (["inspect", tmp_path / "missing.ome.tiff"], ["missing.ome.tiff", "not found"]),
        (["inspect", truncated], ["cut.ome.tiff", "truncated"]),
        (["wash", good, "-o", tmp_path / "w.ome.tiff", "--recipe", bad_recipe],
         ["bad.toml", "speckle.radius", "allowed: >= 1"]),
        (["wash", good, "-o", tmp_path / "w.ome.tiff", "--recipe", unknown],
         ["unknown.toml", "speckle.window"]),
        (["wash", good, "-o", good], ["good.ome.tiff", "is an input"]),
        (["wash", good, "-o", "/proc/plexwash/w.ome.tiff"], ["not writable"]),
        (["wash", good, "-o", tmp_path / "w.ome.tiff", "--spillover", tmp_path / "nope.csv"],
         ["nope.csv"]),
        (["recipe", "new", "-o", "/proc/plexwash/r.toml"], ["not writable"]),
        (["inspect"], ["plexwash inspect"]),
    ]
    for args, fragments in cases:
        assert_one_line_error(run_cli(*args), *fragments)
    _no_new_files(tmp_path, before)


def test_spill_controls_writes_matrix_intervals_and_heatmap(tmp_path):
    out = tmp_path / "spill.csv"
    png = tmp_path / "spill.png"
    result = run_cli("spill", "controls", DEMO / "controls" / "controls.csv", "-o", out, "--heatmap", png)
    assert result.returncode == 0, result.stderr
    from plexwash.qc.spillover import interval_paths, read_spillover

    matrix = read_spillover(out)
    truth = read_spillover(DEMO / "truth" / "spillover.csv")
    assert matrix.channels == truth.channels
    assert all(p.exists() for p in interval_paths(out))
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    big = truth.values >= 0.003
    np.fill_diagonal(big, False)
    rel = np.abs(matrix.values[big] - truth.values[big]) / truth.values[big]
    assert np.median(rel) < 0.02  # measured 0.80 % on the demo's controls; about 2.5x


def test_run_exit_code_3_when_an_roi_fails(tmp_path):
    cohort = tmp_path / "cohort"
    cohort.mkdir()
    stack = np.random.default_rng(0).poisson(2.0, (2, 40, 40)).astype(np.uint16)
    write_ome_tiff(cohort / "a.ome.tiff", stack, ["Nd145", "Nd146"])
    write_ome_tiff(cohort / "b.ome.tiff", stack, ["Nd145", "Nd146"])
    (cohort / "c.ome.tiff").write_bytes((cohort / "b.ome.tiff").read_bytes()[:300])
    result = run_cli("run", cohort, "-o", tmp_path / "run", "--quiet")
    assert result.returncode == 3, result.stderr
    records = [json.loads(line) for line in (tmp_path / "run" / "ledger.jsonl").read_text().splitlines()]
    status = {r["roi"]: r["status"] for r in records}
    assert status == {"a": "done", "b": "done", "c": "failed"}
    assert "truncated" in next(r for r in records if r["roi"] == "c")["error"]


def test_run_on_demo_flags_failed_stain_empty_raw_and_washed(tmp_path):
    result = run_cli("run", DEMO / "cohort", "-o", tmp_path / "run", "--quiet",
                     "--spillover", DEMO / "truth" / "spillover.csv")
    assert result.returncode == 0, result.stderr
    import csv

    rows = list(csv.DictReader((tmp_path / "run" / "quality.csv").open()))
    assert len(rows) == 3 * 22 * 2  # ROI x channel x stage
    for row in rows:
        is_failed = row["channel"] == "Tb159"  # the demo's failed stain (example_stack/truth)
        assert ("empty" in row["flags"].split(";")) == is_failed, row
    striped = {r["roi"] for r in rows if "striped" in r["flags"].split(";")}
    assert striped == {"roi_02"}
