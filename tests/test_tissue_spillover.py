"""Spillover from tissue lying on glass: background strata, false-pair control, pairs the
tissue cannot identify (issue 12, item 3)."""

from __future__ import annotations

import csv
import doctest
import importlib
import importlib.util
from pathlib import Path

import numpy as np
import pytest
import tifffile
from plexwash.qc.errors import InputError
from plexwash.qc.spillover import estimate_tissue_pairs, read_spillover
from plexwash.qc.spillover.estimates import benjamini_hochberg
from plexwash.qc.spillover.tissue_pairs import COLUMNS, not_identifiable_path

BENCHMARKS = Path(__file__).resolve().parents[1] / "benchmarks"
#: The issue's line for a false pair: estimated >= 0.3 % where the truth is 0.
FALSE_PAIR = 0.003


def load_benchmark(name: str):
    """A benchmark script as a module (it puts its own folder on the path for its siblings)."""
    spec = importlib.util.spec_from_file_location(f"plexwash_bench_{name}", BENCHMARKS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def write_ome(path: Path, counts: np.ndarray, names) -> Path:
    tifffile.imwrite(path, counts.astype(np.uint16), ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": list(names)}})
    return path


# ----------------------------------------------------------------------- false-pair control


def test_benjamini_hochberg_matches_scipy():
    # Reference: scipy.stats.false_discovery_control (Benjamini & Hochberg 1995, method "bh").
    from scipy.stats import false_discovery_control

    rng = np.random.default_rng(4)
    for _ in range(300):
        p = rng.uniform(size=int(rng.integers(1, 80))) ** rng.uniform(0.3, 5.0)
        for rate in (0.01, 0.05, 0.2):
            expected = false_discovery_control(p) <= rate
            np.testing.assert_array_equal(benjamini_hochberg(p, rate), expected)
    assert benjamini_hochberg([], 0.05).size == 0
    with pytest.raises(InputError, match="false_pair_rate"):
        benjamini_hochberg([0.01], 1.5)


def test_new_modules_docstring_examples_run():
    attempted = 0
    for name in ("estimates", "tissue_background", "tissue_pairs"):
        module = importlib.import_module(f"plexwash.qc.spillover.{name}")
        result = doctest.testmod(module, verbose=False)
        assert result.failed == 0, name
        attempted += result.attempted
    assert attempted >= 5


# ----------------------------------------------------------------------- strata, on a small synthetic ROI


def glass_and_tissue(rng, spill: float, shape=(256, 256)):
    """Two channels, Nd145 -> Nd146 (M + 1): the source stains cells that lie only in the
    tissue (right half), where both channels' background is about 12 x that on the glass.
    The receiver has a stain of its own (other cells). Returns (counts, names)."""
    height, width = shape
    yy, xx = np.mgrid[0:height, 0:width]
    tissue = xx >= width // 2
    background = np.where(tissue, 0.15, 0.012)
    source = np.zeros(shape)
    receiver = np.zeros(shape)
    for k, (y, x) in enumerate(rng.integers([6, width // 2 + 6], [height - 6, width - 6], (160, 2))):
        disc = (yy - y) ** 2 + (xx - x) ** 2 <= 16
        (source if k % 3 else receiver)[disc] = 25.0 * rng.lognormal(0, 0.3)
    counts = np.stack([rng.poisson(source + background),
                       rng.poisson(receiver + spill * source) + rng.poisson(background)])
    return counts, ("Nd145", "Nd146")


def test_glass_background_is_not_read_as_spillover(tmp_path):
    # A fit with one background per ROI reads the tissue's higher background under the
    # source's cells as spillover (0.15 counts over ~25 counts: about 0.6 %, more where the
    # cells are sparse); the strata (glass, tissue) must not.
    rng = np.random.default_rng(21)
    paths = []
    for k in range(2):
        counts, names = glass_and_tissue(rng, 0.0)
        paths.append(write_ome(tmp_path / f"zero_{k}.ome.tiff", counts, names))
    result = estimate_tissue_pairs(paths, n_boot=40)
    assert result.matrix.values[0, 1] < FALSE_PAIR
    pair = next(p for p in result.pairs if (p.source, p.receiver) == ("Nd145", "Nd146"))
    assert pair.status in ("absent", "not identifiable") or pair.estimate < FALSE_PAIR


def test_true_spillover_found_over_glass_and_tissue(tmp_path):
    rng = np.random.default_rng(22)
    paths = []
    for k in range(2):
        counts, names = glass_and_tissue(rng, 0.02)
        paths.append(write_ome(tmp_path / f"two_{k}.ome.tiff", counts, names))
    result = estimate_tissue_pairs(paths, n_boot=40)
    pair = next(p for p in result.pairs if (p.source, p.receiver) == ("Nd145", "Nd146"))
    assert pair.status == "reported", pair
    assert abs(result.matrix.values[0, 1] - 0.02) <= 0.25 * 0.02  # the 25 % target
    assert pair.low <= 0.02 <= pair.high
    assert pair.p_value < 1e-6


# ----------------------------------------------------------------------- the independent cohort


@pytest.fixture(scope="module")
def small_tissue_cohort(tmp_path_factory):
    """benchmarks/tissue_cohort.py (independent of example_stack/generate.py), seed 12, with
    smaller ROIs (two plain, one low-count) so the test stays short."""
    cohort = load_benchmark("tissue_cohort")
    saved = cohort.ROIS
    cohort.ROIS = (("tissue_a", (320, 352), "plain"), ("tissue_b", (352, 320), "plain"),
                   ("tissue_low", (288, 288), "low"))
    try:
        folder = tmp_path_factory.mktemp("tissue_cohort")
        cohort.write_cohort(folder, seed=cohort.DEFAULT_SEED)
    finally:
        cohort.ROIS = saved
    return folder


@pytest.mark.slow
def test_independent_tissue_cohort_targets(small_tissue_cohort):
    # Source of truth: the generator's true matrix (benchmarks/tissue_cohort.py, shares no
    # code with example_stack/generate.py); figures as benchmarks/tissue_accuracy.py
    # defines them. Targets of issue 12: no false pair >= 0.3 %, >= 80 % of identifiable
    # pairs within 25 %. Measured here: 0 false pairs, 24 of 25 (96 %).
    bench = load_benchmark("tissue_accuracy")
    figures = bench.spillover_figures(bench.tissue_rois(small_tissue_cohort), n_boot=50)
    assert figures["false pairs"] == []
    assert figures["identifiable"] >= 15  # not a vacuous share
    assert figures["within 25 %"] >= 0.80 * figures["identifiable"] + 2, figures["missed"]
    assert figures["not identifiable"] >= 5  # dim fibre / diffuse / dim stains are refused


@pytest.mark.slow
def test_demo_cohort_targets():
    # Source of truth: the demo's true matrix (example_stack/truth). Issue 12: no false pair
    # >= 0.3 %; the demo must not get worse than before (46 of 46 identifiable pairs within
    # 25 % with the earlier estimator).
    bench = load_benchmark("tissue_accuracy")
    figures = bench.spillover_figures(bench.demo_rois(bench.ROOT / "example_stack"), n_boot=50)
    assert figures["false pairs"] == []
    assert figures["identifiable"] >= 30
    assert figures["within 25 %"] >= 0.95 * figures["identifiable"], figures["missed"]


# ----------------------------------------------------------------------- the command line


def test_cli_lists_pairs_not_identifiable(tmp_path, small_tissue_cohort, capsys):
    from plexwash.qc.cli import main

    rois = []
    for name in ("tissue_a", "tissue_b"):
        with tifffile.TiffFile(small_tissue_cohort / "cohort" / f"{name}.ome.tiff") as tif:
            counts = tif.asarray()
        names = [line.split(",")[0] for line in
                 (small_tissue_cohort / "cohort" / "stains.csv").read_text().splitlines()[1:]]
        rois.append(write_ome(tmp_path / f"{name}.ome.tiff", counts[:, :192, :192], names))
    out = tmp_path / "spill.csv"
    before = {p: p.read_bytes() for p in rois}
    for _ in range(2):  # the second run replaces what the first wrote
        assert main(["spill", "tissue", *map(str, rois), "-o", str(out)]) == 0
    assert {p: p.read_bytes() for p in rois} == before  # inputs untouched
    listed = not_identifiable_path(out)
    assert listed.name == "spill.not_identifiable.csv"
    assert f"listed in {listed.name}" in capsys.readouterr().out
    rows = list(csv.reader(listed.read_text().splitlines()))
    assert tuple(rows[0]) == COLUMNS
    matrix = read_spillover(out)
    pairs = {(r[0], r[1]): r[2] for r in rows[1:]}
    # the two iridium DNA channels always co-occur: listed, never a number
    assert "co-occurs" in pairs[("Ir191", "Ir193")]
    for source, receiver in pairs:
        assert matrix.values[matrix.channels.index(source), matrix.channels.index(receiver)] == 0
    assert all(reason for reason in pairs.values())
