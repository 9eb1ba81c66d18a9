"""Spillover matrices: CSV files, checks, channel masses, plausible pairs, estimation."""

from __future__ import annotations

import csv
import importlib.util
import os
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.io import write_ome_tiff
from plexwash.qc.spillover import (
    CONDITION_LIMIT,
    SpilloverMatrix,
    align_spillover,
    channel_mass,
    check_spillover,
    estimate_from_controls,
    estimate_from_tissue,
    interval_paths,
    plausible_pairs,
    read_spillover,
    write_spillover,
)
from plexwash.qc.steps.compensation import CompensationSettings

NAMES = ("Nd142", "Nd143", "Nd144", "Gd158", "Ir191")


def matrix(values=None, names=NAMES, **kw):
    n = len(names)
    if values is None:
        values = np.eye(n)
        values[0, 1], values[1, 0], values[0, 3], values[2, 1] = 0.024, 0.031, 0.017, 0.0049
    return SpilloverMatrix(names, values, **kw)


def write_csv(path, rows):
    with open(path, "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    return path


# ----------------------------------------------------------------------- CSV files


def test_csv_round_trip_with_interval_and_heatmap(tmp_path):
    m = matrix()
    m = SpilloverMatrix(m.channels, m.values, low=m.values * 0.9, high=m.values * 1.1)
    out = tmp_path / "spill.csv"
    png = tmp_path / "spill.png"
    write_spillover(out, m, heatmap=png)
    back = read_spillover(out)
    assert back.channels == m.channels
    np.testing.assert_allclose(back.values, m.values, rtol=1e-10)
    np.testing.assert_allclose(back.low, m.low, rtol=1e-10)
    np.testing.assert_allclose(back.high, m.high, rtol=1e-10)
    rows = list(csv.reader(open(out)))
    assert rows[0] == ["", *NAMES]  # the contract: empty cell, then receivers
    assert rows[1][:3] == ["Nd142", "1", "0.024"]  # source row: entry (i, j) = i -> j
    assert [p.name for p in interval_paths(out)] == ["spill.low.csv", "spill.high.csv"]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO 15948)
    # atomic writes leave no temporary files behind
    assert sorted(os.listdir(tmp_path)) == ["spill.csv", "spill.high.csv", "spill.low.csv", "spill.png"]
    first = out.read_text()
    again = tmp_path / "again.csv"
    write_spillover(again, back)  # writing what was read gives the same text
    assert again.read_text() == first


def test_columns_may_be_in_another_order(tmp_path):
    path = write_csv(tmp_path / "s.csv", [["", "B", "A"], ["A", "0.1", "1"], ["B", "1", "0"]])
    m = read_spillover(path)
    assert m.channels == ("A", "B")
    assert m.values.tolist() == [[1.0, 0.1], [0.0, 1.0]]
    assert m.low is None


@pytest.mark.parametrize(
    "rows, message",
    [
        ([], "file is empty"),
        ([["X", "A"], ["A", "1"]], "first cell must be empty"),
        ([["", "A", "B"], ["A", "1", "0"], ["B", "0"]], "line 3 has 2 cells, expected 3"),
        ([["", "A", "B"], ["A", "1", "two"], ["B", "0", "1"]], r"line 2 \(A -> B\): 'two' is not a number"),
        ([["", "A", "A"], ["A", "1", "0"], ["A", "0", "1"]], "channel named twice"),
        ([["", "A", "B"], ["A", "1", "0"], ["C", "0", "1"]], "rows only: C; columns only: B"),
        ([["", "A", "B"], ["A", "1", "0"], ["", "0", "1"]], "line 3 has no channel name"),
        ([["", "A", "B"], ["A", "1", "0.5"], ["B", "0.5", "0.9"]], "diagonal entry of B is 0.9"),
    ],
)
def test_bad_csv_files_refused(tmp_path, rows, message):
    path = write_csv(tmp_path / "bad.csv", rows)
    with pytest.raises(InputError, match=message) as info:
        read_spillover(path)
    assert str(info.value).startswith(str(path) + ": ")


def test_missing_file_and_mismatched_interval_file(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        read_spillover(tmp_path / "none.csv")
    write_spillover(tmp_path / "s.csv", matrix())
    write_csv(tmp_path / "s.low.csv", [["", "A"], ["A", "1"]])
    write_csv(tmp_path / "s.high.csv", [["", "A"], ["A", "1"]])
    with pytest.raises(InputError, match="s.low.csv: names other channels"):
        read_spillover(tmp_path / "s.csv")


# ----------------------------------------------------------------------- checks


def bad(i, j, value):
    values = matrix().values.copy()
    values[i, j] = value
    return matrix(values)


@pytest.mark.parametrize(
    "m, message",
    [
        (bad(1, 1, 0.98), "diagonal entry of Nd143 is 0.98, must be 1"),
        (bad(0, 1, 1.0), r"entry Nd142 -> Nd143 is 1; off-diagonal entries must be in \[0, 1\)"),
        (bad(3, 0, -0.01), r"entry Gd158 -> Nd142 is -0.01"),
        (bad(2, 4, np.nan), "entry Nd144 -> Ir191 is not a finite number"),
        (matrix(np.array([[1, 0.999], [0.999, 1]]), names=("A", "B")), r"ill-conditioned \(condition number 2e\+03, limit 1000\)"),
        (matrix(np.array([[1, 0.5, 0.5], [0.5, 1, 0.5], [0.5, 0.5, 1]]), names=("A", "B", "C")), None),
        (SpilloverMatrix(("A", "A"), np.eye(2)), "channel named twice"),
        (matrix(low=np.full((5, 5), 0.2), high=np.full((5, 5), 0.1)), "interval of Nd142 -> Nd142 has low > high"),
    ],
)
def test_matrix_checks(m, message):
    if message is None:
        check_spillover(m)  # a strong but well-conditioned matrix passes
        return
    with pytest.raises(InputError, match=message) as info:
        check_spillover(m, source="spill.csv")
    assert str(info.value).startswith("spill.csv: ")


def test_singular_matrix_refused_with_its_condition_number():
    # entries in [0, 1) and a unit diagonal, yet row 3 = 0.625 * (row 1 + row 2)
    singular = np.array([[1.0, 0.5, 0.8], [0.5, 1.0, 0.8], [0.9375, 0.9375, 1.0]])
    with pytest.raises(InputError, match=r"matrix is (singular|ill-conditioned) \(condition number"):
        check_spillover(matrix(singular, names=("A", "B", "C")))
    assert CONDITION_LIMIT == 1e3


def test_align_by_name_drops_extra_and_names_every_missing_channel():
    m = matrix()
    out = align_spillover(m, ["Gd158", "Nd142"])
    assert out.tolist() == [[1.0, 0.0], [0.017, 1.0]]
    with pytest.raises(InputError, match=r"roi.tiff: no spillover entries for channel\(s\) Yb171, Lu175"):
        align_spillover(m, ["Nd142", "Yb171", "Lu175"], source="roi.tiff")
    ident = align_spillover(m, ["Nd142", "Yb171", "Nd143"], missing="identity")
    assert ident[1].tolist() == [0.0, 1.0, 0.0] and ident[0, 2] == pytest.approx(0.024)
    with pytest.raises(InputError, match="channel named twice"):
        align_spillover(m, ["Nd142", "Nd142"])


def test_compensation_settings_declared_for_the_recipe():
    import dataclasses

    fields = {f.name: f for f in dataclasses.fields(CompensationSettings)}
    assert CompensationSettings() == CompensationSettings(enabled=True, method="nnls", spillover="")
    assert fields["method"].metadata["choices"] == ("nnls", "linear")
    assert all(f.metadata["doc"] for f in fields.values())
    with pytest.raises(dataclasses.FrozenInstanceError):
        CompensationSettings().method = "linear"


# ----------------------------------------------------------------------- masses


@pytest.mark.parametrize(
    "name, expected",
    [
        ("Nd145", ("Nd", 145)), ("145Nd", ("Nd", 145)), ("Nd145Di", ("Nd", 145)),
        ("Nd(145)", ("Nd", 145)), ("Ir191", ("Ir", 191)), ("CD3_Er170", ("Er", 170)),
        ("170Er_CD3", ("Er", 170)), ("Y89", ("Y", 89)), ("In115", ("In", 115)),
        ("Bi209Di", ("Bi", 209)), ("pS6(Yb172Di)", ("Yb", 172)),
        ("CD45", None), ("CK19", None), ("S100", None), ("DNA1", None), ("Ki67", None),
        ("B220", None), ("HLA-DR", None), ("Histone H3", None),
    ],
)
def test_channel_mass(name, expected):
    # expected (element symbol, mass number) read off each name by hand; the symbols are
    # those of the IUPAC periodic table (from memory)
    assert channel_mass(name) == expected


def test_plausible_pairs_follow_the_physics():
    names = ["Nd142", "Nd143", "Pr141", "Nd148", "Gd158", "Gd159x", "Tb159", "Ir191", "CD45"]
    p = plausible_pairs(names)
    idx = {n: k for k, n in enumerate(names)}
    # M +/- 1 neighbours (abundance sensitivity), either direction
    assert p[idx["Nd142"], idx["Pr141"]] and p[idx["Pr141"], idx["Nd142"]]
    assert p[idx["Gd158"], idx["Tb159"]] and p[idx["Tb159"], idx["Gd158"]]
    # same element: isotopic impurity, any mass gap
    assert p[idx["Nd142"], idx["Nd148"]] and p[idx["Nd148"], idx["Nd143"]]
    # oxides: M -> M + 16 only, not the reverse
    assert p[idx["Nd142"], idx["Gd158"]] and not p[idx["Gd158"], idx["Nd142"]]
    assert not p[idx["Nd143"], idx["Gd158"]]  # 143 + 16 = 159
    assert p[idx["Nd143"], idx["Tb159"]]
    assert not p[idx["Pr141"], idx["Ir191"]] and not p[idx["Ir191"], idx["Tb159"]]
    # a name without a mass cannot be ruled out
    assert p[idx["CD45"]].sum() == len(names) - 1 and p[:, idx["CD45"]].sum() == len(names) - 1
    assert not p.diagonal().any()
    assert plausible_pairs(names, all_pairs=True).sum() == len(names) * (len(names) - 1)
    assert plausible_pairs(["CD3", "CD8", "CD20"]).sum() == 6  # no masses: all pairs


# ----------------------------------------------------------------------- estimation helpers


SPOT_CHANNELS = ("Pr141", "Nd142", "Nd143", "Nd144", "Gd158", "Tb159", "Ir191")


def known_matrix(names, rng):
    s = np.eye(len(names))
    pairs = plausible_pairs(names)
    s[pairs] = rng.uniform(0.003, 0.03, int(pairs.sum()))
    return s


def spot_control(rng, s, source, shape=(128, 128), level=150.0, background=0.1, n_hot=6):
    """A single-stain control: stained round spots, Poisson counts, hot pixels in every channel."""
    n = s.shape[0]
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    x = np.zeros(shape)
    for cy, cx in rng.uniform(8, shape[0] - 8, size=(30, 2)):
        x[(yy - cy) ** 2 + (xx - cx) ** 2 < rng.uniform(16, 50)] = level * rng.lognormal(0, 0.2)
    counts = rng.poisson(s[source][:, None, None] * x[None] + background).astype(np.float32)
    for c in range(n):
        counts[c].flat[rng.integers(0, counts[c].size, n_hot)] += rng.uniform(150, 900, n_hot)
    return counts, x > 0


def write_controls(tmp_path, rng, s, names, sources):
    rows = [["file", "channel"]]
    truths = {}
    for k in sources:
        counts, spots = spot_control(rng, s, k)
        write_ome_tiff(tmp_path / f"{names[k]}.ome.tiff", counts, list(names))
        rows.append([f"{names[k]}.ome.tiff", names[k]])
        truths[names[k]] = (counts, spots)
    return write_csv(tmp_path / "controls.csv", rows), truths


# ----------------------------------------------------------------------- controls


@pytest.mark.parametrize("seed", [3, 4])
def test_controls_recover_a_known_matrix_and_beat_the_median_of_ratios(tmp_path, seed):
    rng = np.random.default_rng(seed)
    names = SPOT_CHANNELS
    s = known_matrix(names, rng)
    sources = range(len(names) - 1)
    path, truths = write_controls(tmp_path, rng, s, names, sources)
    m = estimate_from_controls(path)
    assert m.channels == names
    estimated = np.zeros_like(s, dtype=bool)
    estimated[list(sources)] = True
    np.fill_diagonal(estimated, False)
    big = estimated & (s >= 0.003)
    rel = np.abs(m.values - s)[big] / s[big]
    # Measured over seeds 1-5: median relative error 0.39-1.29 %, largest entry error
    # 0.00029-0.00047. Bounds about 2.3x the worst, far inside the brief's targets
    # (median within 10 %, no entry off by more than 0.003), so a 5x regression fails.
    assert np.median(rel) <= 0.03
    assert np.abs(m.values - s)[estimated].max() <= 0.001
    assert np.all(m.values[~plausible_pairs(names) & ~np.eye(len(names), dtype=bool)] == 0)
    assert m.values[-1].tolist() == np.eye(len(names))[-1].tolist()  # no control: identity row
    assert np.all(m.low <= m.values + 1e-12) and np.all(m.values <= m.high + 1e-12)
    assert np.mean(((m.low <= s) & (s <= m.high))[big]) >= 0.8

    # The starting method (Chevrier et al., Cell Systems 2018): median over stained pixels
    # of (y_j - b_j) / (y_i - b_i). At ~1 count/pixel in the receivers it is biased.
    median_rel = []
    for name, (counts, spots) in truths.items():
        i = names.index(name)
        off = ~spots
        b = np.array([np.median(c[off]) for c in counts])
        for j in np.flatnonzero(big[i]):
            ratio = np.median((counts[j][spots] - b[j]) / (counts[i][spots] - b[i]))
            median_rel.append(abs(max(ratio, 0.0) - s[i, j]) / s[i, j])
    # measured over seeds 1-5: the median of ratios is 1.8x (seed 4) to 8.9x worse
    assert np.median(median_rel) > 1.5 * np.median(rel)


@pytest.mark.parametrize("seed", [4242, 3])
def test_controls_on_an_unseen_generated_cohort(tmp_path, generator, seed):
    names = ["Nd142", "Nd143", "Nd144", "Nd145", "Nd146", "Sm147", "Nd148", "Sm149", "Gd158",
             "Tb159", "Gd160", "Dy161", "Dy162", "Ir191"]
    rng = np.random.default_rng(seed)
    s = generator.build_spillover(names, rng)
    stains = generator.random_stains(names, rng)
    rates = generator.draw_background_rates(len(names), rng)
    rows = [["file", "channel"]]
    for name in names[:-1]:
        counts, _ = generator.simulate_control(rng, stains, s, name, 160, background_rate=rates)
        write_ome_tiff(tmp_path / f"c_{name}.ome.tiff", counts, names)
        rows.append([f"c_{name}.ome.tiff", name])
    m = estimate_from_controls(write_csv(tmp_path / "controls.csv", rows), n_boot=50)
    off = ~np.eye(len(names), dtype=bool)
    off[-1] = False
    big = off & (s >= 0.003)
    rel = np.abs(m.values - s)[big] / s[big]
    # measured over seeds 4242, 1, 2, 3: median 0.42-0.75 %, largest error 0.00034-0.00046
    assert np.median(rel) <= 0.02 and np.abs(m.values - s)[off].max() <= 0.001


@pytest.mark.parametrize(
    "rows, message",
    [
        ([["name", "channel"]], "header must have the columns file,channel"),
        ([["file", "channel"]], "lists no controls"),
        ([["file", "channel"], ["a.ome.tiff"]], "line 2 has 1 cells, expected 2"),
        ([["file", "channel"], ["", "Nd142"]], "line 2 needs both a file and a channel"),
        ([["file", "channel"], ["missing.ome.tiff", "Nd142"]], "line 2: control missing.ome.tiff not found"),
        ([["file", "channel"], ["c.ome.tiff", "Yb171"]], "line 2: c.ome.tiff has no channel 'Yb171'"),
    ],
)
def test_bad_controls_refused(tmp_path, rows, message):
    write_ome_tiff(tmp_path / "c.ome.tiff", np.ones((2, 16, 16), np.float32), ["Nd142", "Nd143"])
    path = write_csv(tmp_path / "controls.csv", rows)
    with pytest.raises(InputError, match=message) as info:
        estimate_from_controls(path)
    assert str(info.value).startswith(str(path))


def test_control_problems_name_the_control(tmp_path):
    write_ome_tiff(tmp_path / "flat.ome.tiff", np.ones((2, 16, 16), np.float32), ["Nd142", "Nd143"])
    write_ome_tiff(tmp_path / "other.ome.tiff", np.ones((2, 16, 16), np.float32), ["Nd142", "Gd158"])
    path = write_csv(tmp_path / "c.csv", [["file", "channel"], ["flat.ome.tiff", "Nd142"]])
    with pytest.raises(InputError, match=r"flat.ome.tiff: channel Nd142 shows no stained region"):
        estimate_from_controls(path)
    path = write_csv(tmp_path / "d.csv", [["file", "channel"], ["flat.ome.tiff", "Nd142"],
                                          ["other.ome.tiff", "Nd142"]])
    with pytest.raises(InputError, match=r"other.ome.tiff: has other channels than the first control"):
        estimate_from_controls(path)
    rng = np.random.default_rng(1)
    counts, _ = spot_control(rng, np.eye(2), 0)
    write_ome_tiff(tmp_path / "swapped.ome.tiff", counts[::-1].copy(), ["Nd142", "Nd143"])
    path = write_csv(tmp_path / "f.csv", [["file", "channel"], ["swapped.ome.tiff", "Nd142"]])
    with pytest.raises(InputError, match=r"swapped.ome.tiff: Nd143 measures as much as the stained channel Nd142"):
        estimate_from_controls(path)
    (tmp_path / "broken.ome.tiff").write_bytes(b"not a tiff")
    path = write_csv(tmp_path / "e.csv", [["file", "channel"], ["broken.ome.tiff", "Nd142"]])
    with pytest.raises(InputError, match="broken.ome.tiff"):
        estimate_from_controls(path)
    with pytest.raises(InputError, match="n_boot"):
        estimate_from_controls(path, n_boot=2)


# ----------------------------------------------------------------------- tissue


def load_recovery_benchmark():
    """benchmarks/spillover_recovery.py, for its definition of what tissue can reveal."""
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "spillover_recovery.py"
    spec = importlib.util.spec_from_file_location("plexwash_spillover_recovery", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def tissue_case(generator):
    names = ["Pr141", "Nd142", "Nd143", "Nd144", "Nd146", "Sm147", "Nd148", "Gd158", "Gd160",
             "Dy162", "Dy164", "Ir191", "Ir193"]
    rng = np.random.default_rng(777)
    s = generator.build_spillover(names, rng)
    stains = generator.random_stains(names, rng)
    rates = generator.draw_background_rates(len(names), rng)
    rois, signals = [], []
    for k, shape in enumerate([(256, 288), (288, 256)]):
        counts, truth = generator.simulate_roi(np.random.default_rng([777, k]), stains, s, shape,
                                               background_rate=rates)
        rois.append(counts)
        signals.append(truth["signal"])
    return names, s, rois, signals, [m.role for m in stains]


@pytest.mark.slow
def test_tissue_recovers_what_it_can_reveal(tmp_path, tissue_case):
    names, s, stacks, signals, roles = tissue_case
    paths = []
    for k, counts in enumerate(stacks):
        paths.append(tmp_path / f"roi_{k}.ome.tiff")
        write_ome_tiff(paths[-1], counts, names)
    m = estimate_from_tissue(paths, n_boot=100)
    off = ~np.eye(len(names), dtype=bool)
    false_pairs = off & (s == 0) & (m.values > 0)
    assert false_pairs.sum() <= 2  # target of the brief: at most two false pairs
    # Entries >= 1 % the tissue can reveal: among the source's bright 4 x 4 blocks at
    # least 10 % hold no true signal of the receiver (the benchmark's definition).
    bench = load_recovery_benchmark()
    blocks = np.concatenate([bench.block_signal(x) for x in signals], axis=1)
    can = bench.revealable_pairs(blocks, s, roles)
    assert can.sum() >= 10
    for i, j in zip(*np.nonzero(can), strict=True):
        assert abs(m.values[i, j] - s[i, j]) <= 0.25 * s[i, j], (names[i], names[j], m.values[i, j], s[i, j])
    # the two iridium DNA channels always co-occur: never taken for spillover
    ir = names.index("Ir191"), names.index("Ir193")
    assert m.values[ir[0], ir[1]] == 0 and m.values[ir[1], ir[0]] == 0
    assert np.all((m.low <= m.values + 1e-12) & (m.values <= m.high + 1e-12))


def test_tissue_inputs_checked(tmp_path, tissue_case):
    names, s, stacks, _, _ = tissue_case
    write_ome_tiff(tmp_path / "a.ome.tiff", stacks[0][:, :64, :64], names)
    write_ome_tiff(tmp_path / "b.ome.tiff", stacks[0][:3, :64, :64], names[:3])
    with pytest.raises(InputError, match="b.ome.tiff: has other channels than a.ome.tiff"):
        estimate_from_tissue([tmp_path / "a.ome.tiff", tmp_path / "b.ome.tiff"])
    with pytest.raises(InputError, match="no ROI given"):
        estimate_from_tissue([])
    with pytest.raises(InputError, match="max_value"):
        estimate_from_tissue([tmp_path / "a.ome.tiff"], max_value=1.5)
    with pytest.raises(InputError, match="file not found"):
        estimate_from_tissue([tmp_path / "none.ome.tiff"])


def test_docstring_examples_run():
    import doctest
    import importlib

    attempted = 0
    for name in ("matrix", "files", "masses", "solver"):
        module = importlib.import_module(f"plexwash.qc.spillover.{name}")
        result = doctest.testmod(module, verbose=False)
        assert result.failed == 0, module.__name__
        attempted += result.attempted
    assert attempted >= 15
