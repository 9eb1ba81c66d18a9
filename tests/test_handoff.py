"""Hand-off to segmentation (qc/composite.py, qc/run/handoff.py): composites, cohort-wide percentiles, arcsinh.

The tissue comes from a small generator written here (Voronoi cells from jittered seeds,
a nucleus disc at each seed, membranes on the cell borders, Poisson counts); it shares no
code with example_stack/generate.py. Its nuclei and membranes are our own simulation's
truth, not the world's.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from plexwash.qc.composite import (
    PercentileSketch,
    build_composite,
    read_composite_event,
    role_channels,
    scale_channel,
)
from plexwash.qc.errors import InputError
from scipy import ndimage
from scipy.spatial import cKDTree

TAGS = ["Ir191", "Ir193", "Pr141", "Nd150", "Sm149"]
MARKERS = ["DNA-1", "DNA-2", "E-cadherin", "Na-K-ATPase", "CD45"]
ROLES = ["nuclear", "nuclear", "membrane", "membrane", ""]


def cells_and_membranes(seed, size=200, spacing=18):
    """Raw counts (5, Y, X) and the true nuclei and membrane masks."""
    rng = np.random.default_rng(seed)
    grid = np.arange(spacing / 2, size, spacing)
    seeds = np.array([(y, x) for y in grid for x in grid], float)
    seeds += rng.uniform(-spacing / 4, spacing / 4, seeds.shape)
    yy, xx = np.mgrid[:size, :size]
    pixels = np.stack([yy.ravel(), xx.ravel()], axis=1)
    distance, label = cKDTree(seeds).query(pixels)
    label = label.reshape(size, size)
    nuclei = (distance.reshape(size, size) <= 3.5).astype(float)
    border = (np.diff(label, axis=0, prepend=label[:1]) != 0) | (np.diff(label, axis=1, prepend=label[:, :1]) != 0)
    membrane = ndimage.binary_dilation(border).astype(float)
    immune = np.isin(label, rng.choice(len(seeds), len(seeds) // 3, replace=False))
    blur = lambda image: ndimage.gaussian_filter(image, 0.7)  # noqa: E731  (optics)
    expected = np.stack([
        60.0 * blur(nuclei) + 1.0,
        150.0 * blur(nuclei) + 2.0,
        35.0 * blur(membrane) + 1.0,
        12.0 * blur(membrane) + 0.5,
        25.0 * immune * (1 - nuclei) + 0.5,
    ])
    return rng.poisson(expected).astype(np.float32), nuclei, membrane


def pearson(a, b):
    return float(np.corrcoef(np.ravel(a), np.ravel(b))[0, 1])


@pytest.fixture
def cohort(tmp_path):
    from plexwash.qc.io import write_ome_tiff

    folder = tmp_path / "cohort"
    folder.mkdir()
    truth = {}
    for seed in (21, 22):
        raw, nuclei, membrane = cells_and_membranes(seed)
        write_ome_tiff(folder / f"roi_{seed}.ome.tiff", raw, TAGS)
        truth[f"roi_{seed}"] = (nuclei, membrane)
    (folder / "stains.csv").write_text("tag,marker,wash,role\n" + "".join(
        f"{t},{m},yes,{r}\n" for t, m, r in zip(TAGS, MARKERS, ROLES, strict=True)))
    return folder, truth


def plexwash(*args):
    return subprocess.run([sys.executable, "-m", "plexwash.qc.cli", *map(str, args)],
                          capture_output=True, text=True)


@pytest.mark.slow
def test_composites_equal_a_numpy_reference_and_follow_the_true_cells(tmp_path, cohort):
    from plexwash.qc import read_roi, wash
    from plexwash.qc.run import run_cohort

    folder, truth = cohort
    recipe = tmp_path / "recipe.toml"
    recipe.write_text('[output]\ntransform = "arcsinh"\n\n[output.channels.Sm149]\ncofactor = 2.0\n')
    out = tmp_path / "run"
    assert run_cohort(folder, out, recipe=recipe, progress=False).exit_code == 0
    washed = {name: read_roi(out / f"{name}.ome.tiff") for name in truth}
    # the reference: numpy.percentile over every washed level-0 pixel of the cohort
    exact = {}
    for k, tag in enumerate(TAGS[:4]):
        values = np.concatenate([np.asarray(w.data[k]).ravel() for w in washed.values()])
        exact[tag] = tuple(np.percentile(values, [1.0, 99.5]))
    event = read_composite_event(out)
    assert event["roles"] == dict(zip(TAGS[:4], ROLES[:4], strict=True))
    for tag, (low, high) in exact.items():  # measured relative error <= 4.2e-5 (4 seeds)
        assert event["percentiles"][tag][0] == pytest.approx(low, rel=1.5e-4, abs=1e-6)
        assert event["percentiles"][tag][1] == pytest.approx(high, rel=1.5e-4)
    for name, (nuclei, membrane) in truth.items():
        composite = read_roi(out / f"{name}.composite.ome.tiff")
        assert composite.channels == ("nuclear", "membrane")
        data = np.asarray(composite.data)
        assert data.dtype == np.float32 and data.min() >= 0.0 and data.max() <= 1.0
        w = np.asarray(washed[name].data, np.float64)
        scaled = [np.clip((w[k] - lo) / (hi - lo), 0, 1) for k, (lo, hi) in enumerate(exact.values())]
        reference = np.stack([(scaled[0] + scaled[1]) / 2, (scaled[2] + scaled[3]) / 2])
        assert np.abs(data - reference).max() < 1e-4  # measured 3.2e-5 (the sketch's error)
        # the generator's truth (measured r over 4 seeds: nuclear 0.96, membrane 0.94)
        assert pearson(data[0], nuclei) >= 0.8
        assert pearson(data[1], membrane) >= 0.6
        # arcsinh: every channel, its own cofactor; the washed stack itself untouched
        transformed = np.asarray(read_roi(out / f"{name}.arcsinh.ome.tiff").data)
        cofactors = np.array([5.0, 5.0, 5.0, 5.0, 2.0])[:, None, None]
        np.testing.assert_allclose(transformed, np.arcsinh(w / cofactors), rtol=1e-6, atol=1e-6)
        raw = read_roi(folder / f"{name}.ome.tiff", stains=folder / "stains.csv")
        assert np.array_equal(np.asarray(washed[name].data), np.asarray(wash(raw).data))
    # the ledger holds the percentiles; readers of ROI records never see the event
    from plexwash.qc.ledger import read_ledger

    assert sorted(r["roi"] for r in read_ledger(out)) == sorted(truth)
    page = (out / "report.html").read_text()
    assert "Composites for segmentation" in page and "composite of roi_21" in page
    # a rerun redoes nothing, and writes the same composites again
    before = np.asarray(read_roi(out / "roi_21.composite.ome.tiff").data)
    summary = run_cohort(folder, out, recipe=recipe, progress=False)
    assert summary.skipped == 2
    assert np.array_equal(np.asarray(read_roi(out / "roi_21.composite.ome.tiff").data), before)


def test_build_composite_mean_and_max_match_numpy():
    rng = np.random.default_rng(2)
    planes = {n: rng.gamma(2.0, 10.0, (40, 30)) for n in "abcd"}
    roles = {"a": "nuclear", "b": "nuclear", "c": "membrane", "d": "membrane"}
    bounds = {n: tuple(np.percentile(p, [1, 99.5])) for n, p in planes.items()}

    def ref(n):
        lo, hi = bounds[n]
        return np.clip((planes[n] - lo) / (hi - lo), 0, 1)

    mean = build_composite(planes, roles, bounds)
    assert mean.dtype == np.float32 and mean.shape == (2, 40, 30)
    np.testing.assert_allclose(mean[0], (ref("a") + ref("b")) / 2, rtol=1e-6)
    most = build_composite(planes, roles, bounds, combine="max")
    np.testing.assert_allclose(most[1], np.maximum(ref("c"), ref("d")), rtol=1e-6)
    assert not scale_channel(planes["a"], 5.0, 5.0).any()  # no range: 0, not a division by 0


def test_the_percentile_sketch_matches_numpy_percentile():
    # reference: numpy.percentile (method "linear") on the same values, fed in pieces
    rng = np.random.default_rng(5)
    values = np.concatenate([np.zeros(5000), rng.lognormal(2.0, 1.5, 200_000)]).astype(np.float32)
    sketch = PercentileSketch()
    for piece in np.array_split(rng.permutation(values), 7):
        sketch.add(piece)
    for q in (0.5, 1.0, 50.0, 99.5, 100.0):
        assert sketch.percentile(q) == pytest.approx(np.percentile(values, q), rel=2e-4, abs=1e-6)


def test_roles_need_both_composites():
    assert role_channels(["", ""]) == {}
    with pytest.raises(InputError, match="sets nuclear but no channel is membrane"):
        role_channels(["nuclear", ""], where="stains.csv")


@pytest.mark.parametrize("recipe_text, sheet_roles, problem", [
    ("[output]\ncofactor = 0\n", None, "output.cofactor = 0.0 is out of range"),
    ("[output.channels.Ir191]\ncofactor = -1.0\n", None, "output.channels.Ir191.cofactor"),
    ("[output.channels.Ir191]\ncompression = \"zstd\"\n", None, "per channel only cofactor"),
    ("[composite]\nlow_percentile = 99.0\nhigh_percentile = 50.0\n", None, "must be below"),
    ("", ["nuclear", "nuclear", "", "", ""], "no channel is membrane"),
    ("", ["nuclear", "", "membrane", "", ""], None),  # fine: the run goes on
])
def test_bad_handoff_input_stops_the_run_in_one_line(tmp_path, cohort, recipe_text, sheet_roles,
                                                     problem):
    folder, _ = cohort
    recipe = tmp_path / "r.toml"
    recipe.write_text(recipe_text)
    sheet = folder / "stains.csv"
    if sheet_roles is not None:
        sheet.write_text("tag,marker,wash,role\n" + "".join(
            f"{t},{m},yes,{r}\n" for t, m, r in zip(TAGS, MARKERS, sheet_roles, strict=True)))
    out = tmp_path / "run"
    if problem is None:  # a check that can pass: only the refusal below is under test
        from plexwash.qc.io import read_stains
        from plexwash.qc.recipe import load_recipe
        from plexwash.qc.run.handoff import check_markers

        names = check_markers(load_recipe(recipe), read_stains(sheet), None, ["roi_21"])
        assert names == ["roi_21.composite.ome.tiff"]
        return
    done = plexwash("run", folder, "-o", out, "--recipe", recipe)
    assert done.returncode == 2, done.stderr
    assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
    assert problem in done.stderr
    assert (str(recipe) if recipe_text else str(sheet)) in done.stderr
    assert not out.exists()


def test_a_composite_name_taken_by_a_foreign_file_is_refused(tmp_path, cohort):
    folder, _ = cohort
    out = tmp_path / "run"
    out.mkdir()
    (out / "roi_21.composite.ome.tiff").write_bytes(b"someone else's")
    done = plexwash("run", folder, "-o", out)
    assert done.returncode == 2 and "not written by plexwash" in done.stderr
    assert (out / "roi_21.composite.ome.tiff").read_bytes() == b"someone else's"
    assert sorted(p.name for p in out.iterdir()) == ["roi_21.composite.ome.tiff"]


def test_the_composite_event_is_kept_by_the_ledger_repair(tmp_path):
    from plexwash.qc.ledger import Ledger, repair_ledger

    ledger = Ledger(tmp_path / "ledger.jsonl")
    ledger.append({"roi": "a", "status": "done"})
    ledger.append({"event": "composites", "percentiles": {"X": [0.0, 1.0]}, "rois": ["a"]})
    assert not repair_ledger(tmp_path / "ledger.jsonl")  # nothing to drop
    assert json.loads((tmp_path / "ledger.jsonl").read_text().splitlines()[1])["event"] == "composites"
    assert read_composite_event(tmp_path)["percentiles"] == {"X": [0.0, 1.0]}


def test_hand_off_files_no_longer_asked_for_are_removed(tmp_path):
    # a rerun without roles, transform or pairs leaves no stale composite, arcsinh or audit.csv
    from plexwash.qc.audit import write_audit_table
    from plexwash.qc.files import write_atomic
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.ledger import Ledger
    from plexwash.qc.recipe import default_recipe
    from plexwash.qc.run.handoff import write_handoff

    stack = np.ones((2, 16, 16), np.float32)
    for name in ("a.ome.tiff", "a.composite.ome.tiff", "a.arcsinh.ome.tiff"):
        write_ome_tiff(tmp_path / name, stack, ["X", "Y"])
    write_atomic(tmp_path / "audit.csv", "roi,first,second,stage\n")
    (tmp_path / "b.composite.ome.tiff").write_bytes(b"not ours")  # never touched
    record = {"roi": "a", "status": "done", "output": "a.ome.tiff"}
    Ledger(tmp_path / "ledger.jsonl").append(record)
    assert write_handoff(tmp_path, [record], default_recipe()) is None
    assert write_audit_table(tmp_path) is None
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "a.ome.tiff", "b.composite.ome.tiff", "ledger.jsonl"]


def test_a_run_folder_opened_as_a_cohort_lists_no_hand_off_file(tmp_path):
    from plexwash.qc.io import list_cohort, write_ome_tiff

    for name in ("a.ome.tiff", "a.composite.ome.tiff", "a.arcsinh.ome.tiff"):
        write_ome_tiff(tmp_path / name, np.ones((2, 8, 8), np.float32), ["X", "Y"])
    assert [p.name for p in list_cohort(tmp_path)] == ["a.ome.tiff"]
