"""The crosstalk audit (qc/audit.py): definitions, the test against scipy, and validation on
data with known spillover between markers that never share a cell, and on markers that do.

The cells come from a small generator written here (discs on a jittered grid, Poisson
counts); it shares no code with example_stack/generate.py. Its truth (which cell carries
which marker, the spillover fraction) is our own simulation, not the world.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from plexwash.qc import compensate
from plexwash.qc.audit import (
    AuditSettings,
    audit_roi,
    co_positivity,
    parse_exclusive,
    read_audit_csv,
    resolve_pairs,
)
from plexwash.qc.errors import InputError
from plexwash.qc.spillover import SpilloverMatrix

TAGS = ("Nd146", "Nd147", "Ir191")
MARKERS = ("CD20", "CD3", "DNA")


def cells(rng, size=240, spacing=20, radius=5):
    """Disc masks of cells on a jittered grid: a (n, Y, X) bool array."""
    yy, xx = np.mgrid[:size, :size]
    masks = []
    for cy in range(spacing // 2, size, spacing):
        for cx in range(spacing // 2, size, spacing):
            y, x = cy + rng.integers(-2, 3), cx + rng.integers(-2, 3)
            masks.append((yy - y) ** 2 + (xx - x) ** 2 <= radius ** 2)
    return np.array(masks)


def tissue(seed, *, co_occur=False, spill=0.05, a_level=600.0, b_level=60.0, background=0.5):
    """Raw counts of three channels (A, B, DNA) and the true spillover matrix.

    ``co_occur=False``: A and B in disjoint halves of the cells (they never share one);
    True: B in 70 % of A's cells. ``spill``: the fraction of A measured in B.
    """
    rng = np.random.default_rng(seed)
    masks = cells(rng)
    n = len(masks)
    order = rng.permutation(n)
    a_cells = order[: n // 2]
    b_cells = a_cells[: int(0.7 * len(a_cells))] if co_occur else order[n // 2:]
    truth = np.zeros((3,) + masks.shape[1:])
    truth[0] = a_level * masks[a_cells].any(axis=0)
    truth[1] = b_level * masks[b_cells].any(axis=0)
    truth[2] = 40.0 * masks.any(axis=0)
    matrix = np.eye(3)
    matrix[0, 1] = spill
    measured = np.einsum("ij,iyx->jyx", matrix, truth) + background
    raw = rng.poisson(measured).astype(np.float32)
    return raw, SpilloverMatrix(TAGS, matrix)


def rows_by_stage(rows):
    return {r["stage"]: r for r in rows}


SETTINGS = AuditSettings(exclusive=(("CD20", "CD3"),))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_spillover_between_exclusive_markers_is_seen_raw_and_gone_washed(seed):
    raw, matrix = tissue(seed)
    washed = compensate(raw, matrix)  # NNLS with the true matrix
    rows = rows_by_stage(audit_roi(raw, washed, channels=TAGS, labels=MARKERS, roi="r",
                                   settings=SETTINGS))
    r, w = rows["raw"], rows["washed"]
    # raw: the ghost of every A cell makes B positive there (seeds 1-3: co-positive 0.85,
    # expected 0.30, p < 1e-300)
    assert r["co_positive"] > 2 * r["expected"] and r["p_value"] < 1e-6
    assert r["flags"] == ["above-chance"]
    # washed: down to chance or below (measured 0.000-0.003 vs expected 0.16); not flagged
    assert w["co_positive"] <= w["expected"]
    assert w["flags"] == []


def test_a_wash_that_left_the_spillover_is_flagged():
    # no compensation at all: the washed stack still holds the ghost; the flag must fire,
    # and the co-positive bins look like spillover (B gets 5 % of A; measured ratio 0.050)
    raw, _ = tissue(4)
    rows = rows_by_stage(audit_roi(raw, raw.copy(), channels=TAGS, labels=MARKERS, settings=SETTINGS))
    assert rows["washed"]["flags"] == ["crosstalk-left"]
    assert rows["washed"]["ratio"] < 0.1


@pytest.mark.parametrize("seed", [5, 6])
def test_markers_that_truly_share_cells_are_not_called_a_failed_wash(seed):
    # B at a quarter of A's level in 70 % of A's cells, no spillover
    raw, matrix = tissue(seed, co_occur=True, spill=0.0, b_level=150.0)
    washed = compensate(raw, matrix)
    rows = rows_by_stage(audit_roi(raw, washed, channels=TAGS, labels=MARKERS, settings=SETTINGS))
    assert rows["raw"]["co_positive"] > 1.5 * rows["raw"]["expected"]  # they do co-occur
    assert "crosstalk-left" not in rows["washed"]["flags"]
    assert rows["washed"]["flags"] == ["co-occur"]  # said so, as a declaration to check
    assert rows["washed"]["ratio"] > 0.15  # B's own level is 25 % of A's (measured 0.25)


def test_the_p_value_is_the_one_sided_fisher_exact_test():
    # reference: scipy.stats.fisher_exact(alternative="greater") on the 2 x 2 table of the
    # two markers' positive bins is the one-sided hypergeometric test
    from scipy.stats import fisher_exact

    rng = np.random.default_rng(0)
    a = rng.poisson(1.0, (60, 60)).astype(float)
    b = rng.poisson(1.0, (60, 60)).astype(float)
    a[:30, :30] += 30
    b[20:40, 20:50] += 30
    m = co_positivity(a, b, settings=AuditSettings(block=2))
    pa, pb = m["mask_first"], m["mask_second"]
    table = [[int((pa & pb).sum()), int((pa & ~pb).sum())],
             [int((~pa & pb).sum()), int((~pa & ~pb).sum())]]
    assert m["n_both"] == table[0][0] > 0
    assert m["p_value"] == pytest.approx(fisher_exact(table, alternative="greater")[1], rel=1e-9)


def test_co_positive_is_symmetric_and_follows_its_definition():
    rng = np.random.default_rng(3)
    a = rng.poisson(1.0, (90, 90)).astype(float)
    b = rng.poisson(1.0, (90, 90)).astype(float)
    a[:45] += 500.0  # a bright marker over half of the image
    b[30:60, :30] += 20.0  # a dim one over a small part of it and beyond
    ab, ba = co_positivity(a, b), co_positivity(b, a)
    assert ab["co_positive"] == ba["co_positive"] and ab["expected"] == ba["expected"]
    assert ab["p_value"] == pytest.approx(ba["p_value"])
    n_a, n_b, n_ab, n = ab["n_first"], ab["n_second"], ab["n_both"], ab["n_bins"]
    assert ab["co_positive"] == n_ab / min(n_a, n_b)  # the overlap coefficient
    assert ab["expected"] == max(n_a, n_b) / n  # chance: n_a n_b / n over min(n_a, n_b)
    # the dim marker's bins: half of them lie in the bright half (rows 30-45 of 30-60)
    assert ab["co_positive"] == pytest.approx(0.5, abs=0.06)


def test_glass_outside_the_tissue_does_not_count_as_chance():
    # expected is taken within the tissue: the same cells on a bigger glass slide give
    # the same expected value (measured equal to 3 decimals)
    raw, _ = tissue(8)
    wide = np.random.default_rng(9).poisson(0.01, (3, 240, 480)).astype(np.float32)
    wide[:, :, :240] = raw
    one = rows_by_stage(audit_roi(raw, None, channels=TAGS, labels=MARKERS, settings=SETTINGS))
    two = rows_by_stage(audit_roi(wide, None, channels=TAGS, labels=MARKERS, settings=SETTINGS))
    assert two["raw"]["expected"] == pytest.approx(one["raw"]["expected"], abs=0.03)


def test_pairs_are_checked():
    assert parse_exclusive([["A", "B"], ["C", "D"]], where="r.toml") == (("A", "B"), ("C", "D"))
    with pytest.raises(InputError, match="same marker twice"):
        parse_exclusive([["A", "A"]], where="r.toml")
    with pytest.raises(InputError, match="two names"):
        parse_exclusive([["A"]], where="r.toml")
    with pytest.raises(InputError, match="not in the ROI.*CD99, Xe1"):
        resolve_pairs([("CD99", "CD3"), ("Nd146", "Xe1")], TAGS, MARKERS, where="r.toml")
    with pytest.raises(InputError, match="same marker twice"):  # the tag and its marker name
        resolve_pairs([("Nd146", "CD20")], TAGS, MARKERS, where="r.toml")
    assert resolve_pairs([("CD3", "Nd146")], TAGS, MARKERS, where="r.toml") == [(1, 0)]


# --------------------------------------------------------------------------- run and CLI


@pytest.fixture
def cohort(tmp_path):
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.spillover import write_spillover

    folder = tmp_path / "cohort"
    folder.mkdir()
    for seed in (11, 12):
        raw, matrix = tissue(seed)
        write_ome_tiff(folder / f"roi_{seed}.ome.tiff", raw, list(TAGS), labels=list(MARKERS))
    spill = write_spillover(tmp_path / "spill.csv", matrix)
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(f'[compensation]\nspillover = "{spill}"\n\n[audit]\nexclusive = [["CD20", "CD3"]]\n')
    return folder, recipe


def plexwash(*args):
    return subprocess.run([sys.executable, "-m", "plexwash.qc.cli", *map(str, args)],
                          capture_output=True, text=True)


@pytest.mark.slow
def test_the_run_writes_audit_csv_and_the_report_shows_it(tmp_path, cohort):
    from plexwash.qc.run import run_cohort

    folder, recipe = cohort
    out = tmp_path / "run"
    summary = run_cohort(folder, out, recipe=recipe, progress=False)
    assert summary.exit_code == 0
    rows = read_audit_csv(out / "audit.csv")
    header = (out / "audit.csv").read_text().splitlines()[0].split(",")
    assert header[:7] == ["roi", "first", "second", "stage", "co_positive", "expected", "flags"]
    assert [(r["roi"], r["stage"]) for r in rows] == [
        ("roi_11", "raw"), ("roi_11", "washed"), ("roi_12", "raw"), ("roi_12", "washed")]
    assert all(r["first"] == "Nd146" and r["second"] == "Nd147" for r in rows)
    assert [r["flags"] for r in rows if r["stage"] == "raw"] == [["above-chance"]] * 2
    assert all(r["flags"] == [] for r in rows if r["stage"] == "washed")
    page = (out / "report.html").read_text()
    assert "Crosstalk audit" in page and "CD20" in page and "data:image/png;base64" in page
    # inspect on one ROI gives the same numbers as the run (same wash, same audit)
    shown = plexwash("inspect", folder / "roi_11.ome.tiff", "--recipe", recipe, "--json")
    assert shown.returncode == 0, shown.stderr
    audit = json.loads(shown.stdout)["audit"]
    for got, want in zip(audit, rows[:2], strict=True):
        assert got["stage"] == want["stage"]
        assert got["co_positive"] == pytest.approx(want["co_positive"])
        assert got["flags"] == want["flags"]
    text = plexwash("inspect", folder / "roi_11.ome.tiff", "--recipe", recipe)
    assert "Crosstalk audit" in text.stdout and "above-chance" in text.stdout


@pytest.mark.parametrize("pairs, problem", [
    ('[["CD20", "CD99"]]', "not in the ROI's channels or stain sheet: CD99"),
    ('[["CD20", "CD20"]]', "names the same marker twice"),
    ('[["CD20", "Nd146"]]', "names the same marker twice"),
    ('[["CD20"]]', "each pair must be two names"),
])
def test_bad_pairs_stop_the_run_and_inspect_in_one_line(tmp_path, cohort, pairs, problem):
    folder, _ = cohort
    recipe = tmp_path / "bad.toml"
    recipe.write_text(f"[audit]\nexclusive = {pairs}\n")
    out = tmp_path / "run"
    for args in (("run", folder, "-o", out, "--recipe", recipe),
                 ("inspect", folder / "roi_11.ome.tiff", "--recipe", recipe)):
        done = plexwash(*args)
        assert done.returncode == 2, done.stderr
        assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
        assert str(recipe) in done.stderr and problem in done.stderr
        assert not out.exists()  # nothing written


def test_bad_audit_settings_are_refused(tmp_path):
    from plexwash.qc.recipe import load_recipe

    recipe = tmp_path / "r.toml"
    recipe.write_text("[audit]\nalpha = 0\n")
    with pytest.raises(InputError, match="audit.alpha"):
        load_recipe(recipe)
    recipe.write_text('[audit]\nexclusive = [["A", "B"]]\nalpha = 0.05\n')
    loaded = load_recipe(recipe)
    assert loaded.audit.exclusive == (("A", "B"),) and loaded.audit.alpha == 0.05
    assert load_recipe(recipe).sha256() == loaded.sha256()
    again = tmp_path / "again.toml"
    again.write_text(loaded.to_toml())  # the written recipe reads back the same
    assert load_recipe(again).sha256() == loaded.sha256()


def test_the_readme_example_is_a_valid_recipe():
    # the [audit] / [composite] / [output] example of README.md reads as a recipe
    import re
    import tomllib
    from pathlib import Path

    from plexwash.qc.recipe import recipe_from_dict

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    blocks = [b for b in re.findall(r"```toml\n(.*?)```", readme, re.S) if "[audit]" in b]
    assert len(blocks) == 1
    recipe = recipe_from_dict(tomllib.loads(blocks[0]))
    assert recipe.audit.exclusive == (("CD20", "CD3"), ("Pan-keratin", "CD45"))
    assert recipe.output.transform == "arcsinh" and recipe.for_channel("output", "Ir191").cofactor == 50.0
