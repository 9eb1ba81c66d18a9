"""Tests of plexwash.qc.quality: SBR/SNR, Otsu split, saturation, empty, striped, outliers."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.quality import (
    QualitySettings,
    add_outlier_flags,
    cohort_outliers,
    measure_channel,
    measure_stack,
    modified_z_scores,
    quality_rows,
    region_snr,
)
from scipy import ndimage
from skimage.filters import threshold_otsu

SEEDS = (0, 1, 2, 3)


# --------------------------------------------------------------------------- synthetic data


def _disks(rng, shape, n, radius=(4.0, 7.0)):
    """Label image of n random disks (later disks win overlaps) and each pixel's
    distance to its disk's centre in radii (inf outside)."""
    height, width = shape
    yy, xx = np.mgrid[0:height, 0:width]
    labels = np.zeros(shape, np.int32)
    scaled = np.full(shape, np.inf)
    for k in range(n):
        cy, cx = rng.uniform(0, height), rng.uniform(0, width)
        r = rng.uniform(*radius)
        d = np.hypot(yy - cy, xx - cx) / r
        take = d < 1.0
        labels[take] = k + 1
        scaled[take] = d[take]
    return labels, scaled


def _stains_stack(seed, *, size=192, dim_level=1.0, dim_types=(0, 2)):
    """A small IMC-like ROI with known roles, drawn independently of plexwash.

    Channels: A bright (whole cells of types 0 and 1, ~80 counts/px), B bright
    (nuclei of types 1 and 2, ~100 counts/px), Dim (``dim_level`` counts/px in cells
    of ``dim_types``, and a 2 % ghost of A), Rare (40 counts/px in 3 cells) and
    Failed (no stain: background, hot pixels incl. a touching pair and one in a
    corner, and ghosts of 3 % of A and 2 % of B, i.e. 1-5 counts/px in cells).
    Background 0.02-0.3 counts/px, Poisson counts, ~3e-4 hot pixels per pixel.
    """
    rng = np.random.default_rng(seed)
    n_cells = int(size * size / 121)
    labels, scaled = _disks(rng, (size, size), n_cells)
    types = np.concatenate([[-1], rng.integers(0, 3, n_cells)])

    def per_cell(level, which, spread=0.3):
        v = level * np.exp(rng.normal(0, spread, n_cells + 1))
        v[~np.isin(types, which)] = 0.0
        v[0] = 0.0
        return v

    x = np.zeros((5, size, size))
    x[0] = per_cell(80.0, (0, 1))[labels]
    x[1] = per_cell(100.0, (1, 2))[labels] * (scaled < 0.55)
    x[2] = per_cell(dim_level, dim_types, 0.2)[labels]
    rare = np.zeros(n_cells + 1)
    rare[rng.choice(np.arange(1, n_cells + 1), 3, replace=False)] = 40.0
    x[3] = rare[labels]
    spill = np.eye(5)
    spill[0, 4], spill[1, 4] = 0.03, 0.02
    spill[0, 2] = 0.02
    spill[1, 3] = 0.01
    mean = np.tensordot(spill, x, axes=(0, 0)) + rng.uniform(0.02, 0.3, 5)[:, None, None]
    counts = rng.poisson(mean).astype(np.int64)
    for c in range(5):
        k = rng.binomial(size * size, 3e-4)
        where = rng.choice(size * size, k, replace=False)
        counts[c].flat[where] += rng.integers(150, 900, k)
    y, xx = rng.integers(10, size - 10, 2)
    counts[4, y, xx] += 400
    counts[4, y + 1, xx] += 300
    counts[4, 0, 0] += 500
    names = ["A", "B", "Dim", "Rare", "Failed"]
    return counts.astype(np.uint16), names, spill


def _cells_image(seed, *, size=256, background=10.0, foreground=100.0, n=25, radius=9.0):
    """Two-level image: disks at ``foreground`` on ``background``, Poisson counts."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size]
    mask = np.zeros((size, size), bool)
    for cy, cx in rng.uniform(20, size - 20, (n, 2)):
        mask |= np.hypot(yy - cy, xx - cx) < radius
    return rng.poisson(np.where(mask, foreground, background)).astype(np.uint16), mask


def otsu_by_exhaustive_search(image, nbins: int = 256) -> float:
    """Otsu's threshold found by trying every split of the histogram one by one.

    Otsu (1979), IEEE Trans. Systems, Man, and Cybernetics 9(1):62-66: the threshold
    maximises the between-class variance w0 w1 (mu0 - mu1)^2 of the grey-level histogram.
    Here the histogram has ``nbins`` equal bins over [min, max], each split is scored from
    its own sums (no cumulative shortcut) and the threshold is the centre of the last bin
    of the lower class (the convention of skimage.filters.threshold_otsu, whose pixels
    above the threshold are foreground). Independent of skimage and of the engine.
    """
    counts, edges = np.histogram(np.ravel(image), bins=nbins)
    centres = (edges[:-1] + edges[1:]) / 2
    best_score, best = -1.0, None
    for k in range(1, nbins):
        n0, n1 = counts[:k].sum(), counts[k:].sum()
        if n0 == 0 or n1 == 0:
            continue
        mu0 = (counts[:k] * centres[:k]).sum() / n0
        mu1 = (counts[k:] * centres[k:]).sum() / n1
        score = n0 * n1 * (mu0 - mu1) ** 2
        if score > best_score:
            best_score, best = score, centres[k - 1]
    return float(best)


# --------------------------------------------------------------------------- split, SBR, SNR


@pytest.mark.parametrize("sigma", [0.0, 1.0, 2.0])
def test_threshold_is_otsu_of_smoothed_log(sigma):
    img, _ = _cells_image(0, background=4.0, foreground=30.0)
    q = measure_channel(img, settings=QualitySettings(smoothing_sigma=sigma))
    assert q.spikes == 0
    # 16-bit data are split in float32 (it holds every value exactly)
    transformed = np.log1p(img.astype(np.float32))
    if sigma:
        transformed = ndimage.gaussian_filter(transformed, sigma, mode="reflect")
    expected = threshold_otsu(transformed)  # reference: skimage.filters.threshold_otsu
    assert q.threshold == pytest.approx(np.expm1(expected), rel=1e-12)
    # and Otsu's own definition, by exhaustive search (Otsu 1979), independent of skimage
    assert q.threshold == pytest.approx(np.expm1(otsu_by_exhaustive_search(transformed)), rel=1e-6)
    assert q.foreground_fraction == pytest.approx(np.mean(transformed > expected))
    # ... and the float64 split of the same image gives the same threshold to float32
    # rounding: far inside one of the histogram's 256 bins
    exact = np.log1p(img.astype(np.float64))
    if sigma:
        exact = ndimage.gaussian_filter(exact, sigma, mode="reflect")
    assert q.threshold == pytest.approx(np.expm1(threshold_otsu(exact)), rel=1e-5)


@pytest.mark.parametrize("lam", [4.0, 25.0, 100.0])
def test_region_snr_of_flat_poisson_field_is_sqrt_lambda(lam):
    # Poisson statistics: mean/std = lam/sqrt(lam) = sqrt(lam)
    # (Young, Gerbrands & van Vliet, Fundamentals of Image Processing).
    for seed in SEEDS:
        field = np.random.default_rng(seed).poisson(lam, (300, 300))
        assert region_snr(field) == pytest.approx(np.sqrt(lam), rel=0.02)


def test_region_snr_edge_cases():
    assert region_snr([2.0, 4.0]) == pytest.approx(3.0)  # mean 3, std 1
    assert region_snr([5.0, 5.0]) == np.inf
    assert np.isnan(region_snr([]))


@pytest.mark.parametrize("levels", [(10.0, 100.0), (4.0, 20.0), (2.0, 40.0), (20.0, 60.0)])
def test_two_level_image_sbr_within_3_percent(levels):
    background, foreground = levels
    for seed in SEEDS:
        img, mask = _cells_image(seed, background=background, foreground=foreground)
        q = measure_channel(img)
        # SBR = mean(fg) / mean(bg): the ratio of the two levels
        assert q.sbr == pytest.approx(foreground / background, rel=0.03)
        # SNR = (mean(fg) - mean(bg)) / std(bg): the project's own definition (quality.py);
        # std(bg) = sqrt(bg) because Poisson counts have variance = mean.
        assert q.snr == pytest.approx((foreground - background) / np.sqrt(background), rel=0.05)
        assert q.foreground_fraction == pytest.approx(mask.mean(), rel=0.03)


def test_low_sbr_flag_follows_the_setting():
    img, _ = _cells_image(1, background=20.0, foreground=60.0)  # SBR 3 by construction
    assert "low-sbr" in measure_channel(img, settings=QualitySettings(low_sbr=4.0)).flags
    assert "low-sbr" not in measure_channel(img, settings=QualitySettings(low_sbr=2.0)).flags


def test_zero_background_gives_finite_sbr():
    img = np.zeros((64, 64))
    img[16:48, 16:48] = 50.0
    q = measure_channel(img, settings=QualitySettings(background_floor=0.01))
    assert q.background_mean == 0.0 and q.background_std == 0.0
    assert 40.0 <= q.foreground_mean <= 50.0  # the smoothed split may take a rim of zeros
    assert q.sbr == pytest.approx(q.foreground_mean / 0.01)  # floor replaces the zero mean
    assert q.snr == pytest.approx(q.foreground_mean / 0.01)  # ... and the zero std


def test_constant_channel_has_no_foreground():
    q = measure_channel(np.full((32, 40), 3.0))
    assert q.foreground_fraction == 0.0
    assert q.sbr == 1.0 and q.snr == 0.0
    assert "empty" in q.flags


def test_hot_pixels_do_not_make_foreground_or_background():
    rng = np.random.default_rng(4)
    img = rng.poisson(0.1, (200, 200)).astype(np.uint16)
    spots = rng.choice(img.size, 30, replace=False)
    img.flat[spots] += rng.integers(150, 900, 30).astype(np.uint16)
    q = measure_channel(img)
    assert q.spikes == 30
    assert "empty" in q.flags
    assert q.background_mean < 0.15  # hot pixels would add ~0.4 counts/px
    assert q.maximum >= 150  # the values as given keep them


def test_inputs_not_modified():
    stack, names, _ = _stains_stack(0, size=96)
    copy = stack.copy()
    measure_stack(stack, names)
    measure_channel(stack[4])
    np.testing.assert_array_equal(stack, copy)


# --------------------------------------------------------------------------- saturation


def test_saturated_fraction_counts_pixels_at_the_dtype_maximum():
    img, mask = _cells_image(2, background=5.0, foreground=900.0)
    img = img.astype(np.uint16)
    saturated = mask & (np.arange(img.shape[1])[None, :] < 128)
    img[saturated] = np.iinfo(np.uint16).max
    # isolated hot pixels at the maximum are spikes, not saturation
    rng = np.random.default_rng(0)
    outside = np.flatnonzero(~ndimage.binary_dilation(mask, iterations=2))
    img.flat[rng.choice(outside, 20, replace=False)] = np.iinfo(np.uint16).max
    q = measure_channel(img)
    assert q.saturation_level == 65535.0
    assert q.saturated_fraction == pytest.approx(saturated.mean(), rel=1e-9)
    assert "saturated" in q.flags
    assert "saturated" not in measure_channel(img, settings=QualitySettings(
        saturated_fraction=0.5)).flags


def test_saturation_of_float_data_needs_a_level():
    img, mask = _cells_image(3, background=5.0, foreground=200.0)
    data = np.minimum(img, 150).astype(np.float32)
    assert measure_channel(data).saturated_fraction == 0.0  # float: no known maximum
    q = measure_channel(data, dtype_max=150)
    assert q.saturated_fraction == pytest.approx(np.mean(data >= 150))
    assert "saturated" in q.flags
    q2 = measure_channel(data, settings=QualitySettings(saturation_level=150.0))
    assert q2.saturated_fraction == q.saturated_fraction


# --------------------------------------------------------------------------- empty


@pytest.mark.parametrize("seed", SEEDS)
def test_failed_stain_is_empty_and_real_stains_are_not(seed):
    stack, names, _ = _stains_stack(seed)
    sq = measure_stack(stack, names)
    empty = {cq.name: cq.empty for cq in sq.channels}
    assert empty == {"A": False, "B": False, "Dim": False, "Rare": False, "Failed": True}
    failed = sq.channel("Failed")
    assert {n for n, _ in failed.ghost_sources[:2]} == {"A", "B"}
    assert failed.spikes >= 2  # the touching pair and the corner spike were set aside


@pytest.mark.parametrize("dim_level, dim_types", [(1.0, (0,)), (1.0, (1,)), (3.0, (0, 1)),
                                                  (2.0, (2,))])
def test_dim_stain_sharing_cells_with_bright_ones_is_not_empty(dim_level, dim_types):
    # the dim stain lies in cells that also carry bright stains (and a ghost of A)
    for seed in SEEDS[:2]:
        stack, names, _ = _stains_stack(seed, dim_level=dim_level, dim_types=dim_types)
        sq = measure_stack(stack, names)
        assert not sq.channel("Dim").empty
        assert sq.channel("Failed").empty


def test_channel_alone_sees_ghosts_as_signal_but_not_hot_pixels():
    stack, names, _ = _stains_stack(1)
    assert not measure_channel(stack[4]).empty  # ghosts are structure
    rng = np.random.default_rng(5)
    noise = rng.poisson(0.2, stack[4].shape)
    noise.flat[rng.choice(noise.size, 40, replace=False)] += 500
    assert measure_channel(noise).empty


def test_known_spillover_matrix_explains_ghosts():
    for seed in SEEDS[:2]:
        stack, names, spill = _stains_stack(seed)
        sq = measure_stack(stack, names, spillover=spill,
                           settings=QualitySettings(ghosts=False))
        assert [cq.empty for cq in sq.channels] == [False, False, False, False, True]


def test_without_ghost_model_the_failed_stain_is_not_empty():
    stack, names, _ = _stains_stack(0)
    sq = measure_stack(stack, names, settings=QualitySettings(ghosts=False))
    assert not sq.channel("Failed").empty
    assert sq.channel("Failed").ghost_sources == ()


def test_per_channel_settings():
    stack, names, _ = _stains_stack(0, size=128)
    lenient = QualitySettings(min_area=1e9)  # nothing has that much excess
    sq = measure_stack(stack, names, channel_settings=[QualitySettings()] * 4 + [lenient])
    assert sq.channel("Failed").empty
    sq = measure_stack(stack, names, channel_settings=[lenient] + [QualitySettings()] * 4)
    assert sq.channel("A").empty and not sq.channel("B").empty


def test_washed_stage_keeps_raw_empty_verdicts():
    stack, names, spill = _stains_stack(1)
    raw = measure_stack(stack, names)
    # a stand-in for washing: ghosts subtracted (unconstrained solve, clipped at 0),
    # then everything below 1 count set to 0 and a remainder left in the failed stain
    washed = np.linalg.solve(spill.T, stack.reshape(5, -1).astype(float)).reshape(stack.shape)
    washed = np.where(washed >= 1.0, washed, 0.0)
    washed[4] += np.where(stack[0] > 60, 1.0, 0.0)  # a remainder shaped like channel A
    washed[3] = 0.0  # over-cleaning: the rare stain wiped out
    sq = measure_stack(washed, names, reference=raw)
    assert [cq.empty for cq in sq.channels] == [False, False, False, True, True]
    assert "empty" in sq.channel("Failed").flags
    with pytest.raises(InputError, match="reference"):
        measure_stack(washed[:4], names[:4], reference=raw)


def _demo_roi(generator, seed, size, stains=None):
    rng = np.random.default_rng(seed)
    stains = stains or generator.default_stains()
    names = [m.channel for m in stains]
    spill = generator.build_spillover(names, np.random.default_rng([seed, 0]))
    counts, truth = generator.simulate_roi(rng, stains, spill, size, n_striped_rows=3)
    return stains, names, counts, truth


@pytest.mark.parametrize("seed, size", [(11, (256, 320)), (12, (320, 256))])
def test_demo_generator_failed_stain_and_stripes(generator, seed, size):
    # truth from example_stack/generate.py (independent of plexwash)
    stains, names, counts, truth = _demo_roi(generator, seed, size)
    sq = measure_stack(counts, names)
    for marker, cq in zip(stains, sq.channels, strict=True):
        assert cq.empty == (marker.role == "failed"), (marker.channel, marker.role)
    assert sq.striped_rows == tuple(int(r) for r in truth["striped_rows"])
    assert sq.striped_columns == ()
    assert sq.flags == ("striped",)


def test_demo_generator_random_stains(generator):
    rng = np.random.default_rng(21)
    channels = ["Y89", "La139", "Pr141", "Nd142", "Nd143", "Nd144", "Nd146", "Sm147", "Eu151",
                "Eu153", "Gd155", "Gd156", "Tb159", "Dy162", "Dy164", "Er166", "Yb172",
                "Ir191", "Ir193"]
    stains = generator.random_stains(channels, rng, failed="Nd143", dim="Sm147", rare="Dy162",
                                   specks="Gd155")
    stains, names, counts, truth = _demo_roi(generator, 21, 288, stains=stains)
    sq = measure_stack(counts, names)
    assert [n for n, cq in zip(names, sq.channels, strict=True) if cq.empty] == ["Nd143"]


# --------------------------------------------------------------------------- stripes


def _striped(stack, rows=(), columns=(), factor=0.1):
    out = stack.astype(np.float64)
    for r in rows:
        out[:, r, :] *= factor
    for c in columns:
        out[:, :, c] *= factor
    return np.round(out).astype(stack.dtype)


@pytest.mark.parametrize("seed", SEEDS)
def test_striped_rows_and_columns_are_found(seed):
    stack, names, _ = _stains_stack(seed)
    damaged = _striped(stack, rows=(50, 51, 120), columns=(80,), factor=0.15)
    sq = measure_stack(damaged, names)
    # cells cover ~80 % of these 5-channel ROIs, so few quiet pixels carry the Poisson test
    # (qc/quality/stripes.py): a drop-out line may lack the counts for the 1e-6 level (row 51
    # of seed 1: 21 counts beside it), but
    # nothing else is flagged and the ROI is (every drop-out line on larger ROIs,
    # tests/test_quality_tissue.py)
    found = [("row", r) for r in sq.striped_rows] + [("column", c) for c in sq.striped_columns]
    truth = {("row", 50), ("row", 51), ("row", 120), ("column", 80)}
    assert set(found) <= truth and len(found) >= 2
    assert sq.flags == ("striped",)
    rows = quality_rows(sq, roi="r", stage="raw")
    assert all("striped" in r["flags"] for r in rows)


@pytest.mark.parametrize("seed", SEEDS)
def test_no_stripes_on_clean_data(seed):
    stack, names, _ = _stains_stack(seed)
    sq = measure_stack(stack, names)
    assert sq.striped_rows == () and sq.striped_columns == ()
    assert sq.flags == ()


def test_mild_drop_is_not_a_stripe_at_default_drop():
    stack, names, _ = _stains_stack(0)
    damaged = _striped(stack, rows=(60,), factor=0.8)
    assert measure_stack(damaged, names).striped_rows == ()
    strict = QualitySettings(stripe_drop=0.3)
    assert measure_stack(_striped(stack, rows=(60,), factor=0.4), names,
                         settings=strict).striped_rows == (60,)


# --------------------------------------------------------------------------- dask


def test_dask_input_gives_the_same_result():
    da = pytest.importorskip("dask.array")
    stack, names, _ = _stains_stack(2, size=160)
    lazy = da.from_array(stack, chunks=(1, 64, 64))
    assert quality_rows(measure_stack(lazy, names), roi="r", stage="raw") == quality_rows(
        measure_stack(stack, names), roi="r", stage="raw")
    assert dataclasses.astuple(measure_channel(lazy[3], name="Rare")) == dataclasses.astuple(
        measure_channel(stack[3], name="Rare"))


# --------------------------------------------------------------------------- outliers


def test_modified_z_score_worked_example():
    # NIST/SEMATECH e-Handbook 1.3.5.17: M = 0.6745 (x - median) / MAD, worked by hand:
    # median 3; |x - 3| = 2, 1, 0, 1, 97 -> MAD 1
    m = modified_z_scores([1.0, 2.0, 3.0, 4.0, 100.0])
    np.testing.assert_allclose(m, [-1.349, -0.6745, 0.0, 0.6745, 65.4265], rtol=1e-12)
    assert list(np.abs(m) > 3.5) == [False, False, False, False, True]  # cutoff 3.5 (Iglewicz & Hoaglin 1993)


def test_modified_z_score_random_against_formula():
    x = np.random.default_rng(3).normal(10, 2, 41)
    median = np.median(x)
    mad = np.median(np.abs(x - median))
    np.testing.assert_allclose(modified_z_scores(x), 0.6745 * (x - median) / mad)  # NIST 1.3.5.17


def test_modified_z_score_guards():
    # MAD = 0: mean absolute deviation * 1.253314 instead (common practice)
    m = modified_z_scores([5.0, 5.0, 5.0, 5.0, 9.0])
    assert m[-1] == pytest.approx(4.0 / (1.253314 * 0.8))
    assert list(m[:4]) == [0.0] * 4
    assert list(modified_z_scores([2.0, 2.0, 2.0])) == [0.0, 0.0, 0.0]
    m = modified_z_scores([1.0, np.nan, 3.0])
    assert np.isnan(m[1]) and m[0] == pytest.approx(-0.6745)


def _table():
    rows = []
    for k, (a, b) in enumerate([(10, 5), (11, 5.2), (9.5, 4.9), (10.4, 5.1), (10.1, 5.0),
                                (2.0, 5.05), (9.8, 4.8), (10.6, 5.3)]):
        for channel, value in (("CD3", a), ("CD20", b)):
            for stage, scale in (("raw", 1.0), ("washed", 2.0)):
                rows.append({"roi": f"roi_{k}", "channel": channel, "stage": stage,
                             "sbr": value * scale, "flags": []})
    return rows


def test_cohort_outliers_per_channel_and_stage():
    found = cohort_outliers(_table())
    assert {(o["roi"], o["channel"], o["stage"]) for o in found} == {
        ("roi_5", "CD3", "raw"), ("roi_5", "CD3", "washed")}
    assert all(abs(o["modified_z"]) > 3.5 for o in found)
    assert cohort_outliers(_table(), cutoff=1e6) == []
    assert cohort_outliers(_table(), log_scale=True)[0]["roi"] == "roi_5"


def test_add_outlier_flags_keeps_flag_form():
    rows = add_outlier_flags(_table())
    flagged = [(r["roi"], r["channel"]) for r in rows if "outlier" in r["flags"]]
    assert flagged == [("roi_5", "CD3"), ("roi_5", "CD3")]
    text_rows = [dict(r, flags="low-sbr") for r in _table()]
    out = add_outlier_flags(text_rows)
    assert out[20]["flags"] == "low-sbr;outlier" and out[0]["flags"] == "low-sbr"
    assert _table()[20]["flags"] == []  # input rows untouched


def test_cohort_outliers_bad_table():
    with pytest.raises(InputError, match="no 'channel'"):
        cohort_outliers([{"roi": "a", "sbr": 1.0}])


# --------------------------------------------------------------------------- rows


def test_quality_rows_are_json_ready():
    stack, names, _ = _stains_stack(0, size=96)
    sq = measure_stack(stack, names)
    rows = quality_rows(sq, roi="roi_01", stage="washed")
    assert [r["channel"] for r in rows] == names
    first = rows[0]
    assert list(first)[:6] == ["roi", "channel", "stage", "sbr", "snr", "flags"]
    for key in ("foreground_fraction", "p50", "p99", "saturated_fraction", "zero_fraction",
                "threshold", "spikes", "excess_area", "ghost_sources", "striped_rows"):
        assert key in first
    json.dumps(rows, allow_nan=False)
    failed = rows[-1]
    assert failed["flags"] == ["empty"] and failed["sbr"] == pytest.approx(sq.channels[-1].sbr)
    joined = quality_rows(sq, roi="roi_01", stage="washed", join_flags=True)
    assert joined[-1]["flags"] == "empty" and joined[0]["flags"] == ""


def test_quality_rows_undefined_metric_is_none():
    sq = measure_stack(np.zeros((1, 16, 16)), ["Z"])
    row = quality_rows(sq, roi="r", stage="raw")[0]
    assert row["foreground_snr"] is None and row["flags"] == ["empty", "low-sbr"]


# --------------------------------------------------------------------------- bad input


def test_bad_input_is_reported():
    with pytest.raises(InputError, match="2-D"):
        measure_channel(np.zeros((2, 3, 4)))
    bad = np.ones((8, 8))
    bad[0, 0] = np.nan
    with pytest.raises(InputError, match="NaN"):
        measure_channel(bad, name="Nd145")
    with pytest.raises(InputError, match="names for a stack of 2"):
        measure_stack(np.zeros((2, 8, 8)), ["a"])
    with pytest.raises(InputError, match="spillover"):
        measure_stack(np.zeros((2, 8, 8)), ["a", "b"], spillover=np.eye(3))
    with pytest.raises(InputError, match="Nd145: channel contains NaN"):
        measure_stack(np.stack([bad, bad]), ["Nd145", "b"])


# --------------------------------------------------------------------------- fast paths


@pytest.mark.parametrize("alpha", [0.05, 1e-6, 1e-12])
def test_poisson_tail_test_equals_the_incomplete_gamma(alpha):
    """The bounds only skip work: the verdicts are those of scipy.special.gammainc."""
    from plexwash.qc.quality.excess import poisson_tail_below as _poisson_tail_below
    from scipy import special

    rng = np.random.default_rng(12)
    mu = 10.0 ** rng.uniform(-3, 5, 300_000)
    n = rng.poisson(mu * rng.uniform(0.3, 4.0, mu.size)).astype(float)
    n[::3] += rng.uniform(0, 1, n[::3].size)  # non-integer counts (compensated data)
    exact = special.gammainc(np.maximum(n, 1e-300), mu) < alpha  # reference: P(N >= n) = P(n, mu)
    exact &= n > mu + np.sqrt(mu)  # where P >= 0.159 (> alpha) by the documented shortcut
    np.testing.assert_array_equal(_poisson_tail_below(n, mu, alpha), exact)


def test_otsu_without_copy_equals_skimage():
    from plexwash.qc.quality.channel import _otsu

    image = np.random.default_rng(4).gamma(2.0, 3.0, (311, 257))
    expected = threshold_otsu(image)  # reference: skimage.filters.threshold_otsu
    assert _otsu(image, image.min(), image.max()) == expected
    # Otsu (1979) by exhaustive search over the 256-bin histogram, independent of skimage
    assert _otsu(image, image.min(), image.max()) == pytest.approx(
        otsu_by_exhaustive_search(image), rel=1e-9)


def test_measure_stack_does_not_depend_on_threads_or_dask():
    import dask.array as da

    rng = np.random.default_rng(8)
    stack = rng.poisson(1.0, (5, 120, 100)).astype(np.uint16)
    stack[1, 30:70, 20:60] += 40
    stack[2] += (0.05 * stack[1]).astype(np.uint16)
    names = ["A", "B", "C", "D", "E"]
    one = measure_stack(stack, names)
    for other in (measure_stack(stack, names, threads=3),
                  measure_stack(da.from_array(stack, chunks=(2, 50, 64)), names, threads=2)):
        assert other == one


def test_channel_threads_follow_the_memory_budget(monkeypatch):
    from plexwash.qc.quality import stack as quality

    # 128 MiB for channels of 6 float32 copies: 5 of 1000 x 1000, 1 of 2000 x 2000
    assert quality.channel_threads((1000, 1000), 4) == 4
    assert quality.channel_threads((2000, 2000), 4) == 1
    monkeypatch.setattr(quality, "QUALITY_WORKING_BYTES", 2 * quality.CHANNEL_COPIES * 4 * 100)
    assert quality.channel_threads((10, 10), 8) == 2 and quality.channel_threads((100, 100), 8) == 1


@pytest.mark.parametrize("alpha", [0.05, 1e-6, 1e-12])
def test_poisson_tail_test_at_the_edge_of_alpha(alpha):
    """Bins whose tail probability lies within a hair of alpha, either side, and the corner
    cases (mu tiny or 0, n huge, non-integer n, n = 0): the verdicts are still those of
    ``scipy.special.gammainc(n, mu) < alpha`` (reference: scipy), bit for bit as a mask."""
    from plexwash.qc.quality.excess import poisson_tail_below as _poisson_tail_below
    from scipy import special

    rng = np.random.default_rng(31)
    n = np.concatenate([rng.integers(1, 300, 20_000).astype(float),
                        rng.uniform(1.0, 5e4, 20_000), 10.0 ** rng.uniform(3, 6, 2_000)])
    # mu where P(n, mu) = alpha exactly (scipy.special.gammaincinv), nudged by relative steps
    # from 1e-15 to 1e-3 either way: every bound must leave these to gammainc or be right
    nudge = rng.choice([-1.0, 1.0], n.size) * 10.0 ** rng.uniform(-15, -3, n.size)
    mu = special.gammaincinv(n, alpha) * (1.0 + nudge)
    corner_n = np.array([0.0, 0.5, 1.0, 2.0, 3.7, 60.0, 1e6, 1e7, 5.0, 5.0])
    corner_mu = np.array([0.0, 0.0, 0.0, 1e-300, 1e-3, 1e-3, 1e6 - 3e3, 1e7 + 1.0, 5.0, 4.0])
    n, mu = np.r_[n, corner_n], np.r_[mu, corner_mu]
    with np.errstate(all="ignore"):
        exact = special.gammainc(n, mu) < alpha
        exact &= n > mu + np.sqrt(mu)  # the documented shortcut (P >= 0.159 there)
    got = _poisson_tail_below(n, mu, alpha)
    np.testing.assert_array_equal(got, exact)
    assert 0 < got.sum() < got.size  # both answers occur
    # scalar mu and 2-D shapes take the same path
    grid = n[:1000].reshape(40, 25)
    np.testing.assert_array_equal(_poisson_tail_below(grid, 50.0, alpha),
                                  _poisson_tail_below(grid.ravel(), np.full(1000, 50.0), alpha).reshape(40, 25))
