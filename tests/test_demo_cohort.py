"""Checks of the committed synthetic demo cohort (example_stack/) and its generator."""

import ast
import csv
import doctest
import importlib.util
import json
import re
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy import ndimage

STACK = Path(__file__).resolve().parents[1] / "example_stack"
GENERATOR = STACK / "generate.py"
MASS = re.compile(r"^([A-Z][a-z]?)(\d{2,3})$")


def _load_generator():
    spec = importlib.util.spec_from_file_location("demo_cohort_generator", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def gen():
    return _load_generator()


@pytest.fixture(scope="module")
def info():
    return json.loads((STACK / "truth" / "truth.json").read_text())


@pytest.fixture(scope="module")
def spill():
    with open(STACK / "truth" / "spillover.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    receivers = rows[0][1:]
    sources = [r[0] for r in rows[1:]]
    matrix = np.array([[float(v) for v in r[1:]] for r in rows[1:]])
    return sources, receivers, matrix


@pytest.fixture(scope="module")
def regenerated(gen, tmp_path_factory):
    out = tmp_path_factory.mktemp("regenerated")
    gen.simulate_cohort(out)
    return out


def _truth(name):
    with np.load(STACK / "truth" / f"{name}.npz") as z:
        return {k: z[k] for k in z.files}


def _read(path):
    with tifffile.TiffFile(path) as tif:
        return tif.asarray(), tif.ome_metadata


def _hot_map(hot, shape):
    out = np.zeros(shape, np.int64)
    np.add.at(out, (hot[:, 0], hot[:, 1], hot[:, 2]), hot[:, 3])
    return out


def _ome_essentials(xml):
    """Channel names and Pixels attributes (robust to tifffile's own XML layout)."""
    pixels = re.search(r"<Pixels ([^>]*)>", xml).group(1)
    return re.findall(r'<Channel [^>]*Name="([^"]*)"', xml), \
        sorted(re.findall(r'(\w+)="([^"]*)"', pixels))


def _data_files(root):
    return sorted(p.relative_to(root) for p in root.rglob("*")
                  if p.is_file() and p.suffix in {".tiff", ".csv", ".npz", ".json"})


def test_generator_imports_only_numpy_tifffile_and_stdlib():
    tree = ast.parse(GENERATOR.read_text())
    top = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            top |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom):
            top.add(node.module.split(".")[0])
    third_party = top - set(sys.stdlib_module_names)
    assert third_party == {"numpy", "tifffile"}


def test_import_has_no_side_effects():
    before = sorted(STACK.rglob("*"))
    _load_generator()
    after = sorted(STACK.rglob("*"))
    assert [p for p in after if "__pycache__" not in p.parts] == \
        [p for p in before if "__pycache__" not in p.parts]


def test_docstring_examples_run(gen):
    result = doctest.testmod(gen, verbose=False)
    assert result.attempted >= 6 and result.failed == 0


def test_committed_files_match_a_regeneration(regenerated):
    produced = _data_files(regenerated)
    assert produced == _data_files(STACK)
    for rel in produced:
        mine, theirs = STACK / rel, regenerated / rel
        if rel.suffix in {".csv", ".json"}:
            assert mine.read_bytes() == theirs.read_bytes(), rel
        elif rel.suffix == ".tiff":
            (a, xml_a), (b, xml_b) = _read(mine), _read(theirs)
            assert a.dtype == b.dtype and np.array_equal(a, b), rel
            assert _ome_essentials(xml_a) == _ome_essentials(xml_b), rel
        else:
            with np.load(mine) as za, np.load(theirs) as zb:
                assert za.files == zb.files, rel
                for key in za.files:
                    assert np.array_equal(za[key], zb[key]), (rel, key)


def test_ome_xml_names_channels_in_order(info):
    ome_types = pytest.importorskip("ome_types")
    with open(STACK / "stains.csv", newline="") as fh:
        stains = list(csv.DictReader(fh))
    assert list(stains[0]) == ["tag", "marker", "wash"]
    assert all(row["wash"] in {"yes", "no"} for row in stains)
    names = [row["tag"] for row in stains]
    assert names == info["channels"]
    files = sorted((STACK / "cohort").glob("*.ome.tiff")) + sorted(
        (STACK / "controls").glob("*.ome.tiff"))
    assert len(files) == 3 + len(info["estimable_sources"])
    for path in files:
        with tifffile.TiffFile(path) as tif:
            # OME-XML validated against the OME 2016-06 XML schema by ome_types (validate=True)
            ome = ome_types.from_xml(tif.ome_metadata, validate=True)
            shape, axes = tif.series[0].shape, tif.series[0].axes
        pixels = ome.images[0].pixels
        assert [c.name for c in pixels.channels] == names
        assert pixels.physical_size_x == 1.0 and pixels.physical_size_y == 1.0
        assert (pixels.size_c, pixels.size_y, pixels.size_x) == shape
        assert axes == "CYX"


def test_roi_shapes_and_dtypes(info):
    shapes = []
    for roi in info["rois"]:
        data, _ = _read(STACK / roi["file"])
        assert data.dtype == np.uint16
        assert all(256 <= s <= 384 for s in data.shape[1:])
        shapes.append(data.shape[1:])
        assert list(data.shape[1:]) == roi["shape"]
    assert len(set(shapes)) == len(shapes)


def _kind(src, dst):
    """Pair kinds of mass-cytometry spillover (Chevrier et al., Cell Systems 2018):
    isotopic impurity (same element), oxide (M+16), neighbour (M+-1)."""
    (e1, m1), (e2, m2) = src, dst
    if e1 == e2 and 0 < abs(m2 - m1) <= 2:
        return "impurity"
    if m2 - m1 == 16:
        return "oxide"
    if abs(m2 - m1) == 1:
        return "neighbour"
    return None


def test_spillover_truth_obeys_the_physics(spill, info):
    sources, receivers, s = spill
    assert sources == receivers == info["channels"]
    assert np.all(np.diag(s) == 1.0)
    assert np.all(s >= 0)
    masses = [MASS.match(n) for n in sources]
    parsed = [(m.group(1), int(m.group(2))) for m in masses]
    # Size ranges written out here, not read from the generator, so a change to the
    # generator's ranges fails this test. The magnitudes are common practice, from memory
    # (no source checked): M+-1 well under 1 %, oxides about 1-3 %, isotopic impurities
    # up to a few %. This checks the generator against its own design, not against data.
    ranges = {"neighbour": (0.003, 0.008), "oxide": (0.01, 0.03), "impurity": (0.01, 0.04)}
    seen = set()
    for i, j in zip(*np.nonzero(s - np.eye(len(s))), strict=True):
        kind = _kind(parsed[i], parsed[j])
        assert kind is not None, (sources[i], receivers[j])
        low, high = ranges[kind]
        assert low <= s[i, j] <= high, (sources[i], receivers[j], s[i, j])
        seen.add(kind)
        assert "Ir" not in (parsed[i][0], parsed[j][0])
    assert seen == {"neighbour", "oxide", "impurity"}
    listed = {(p["source"], p["receiver"]): p["value"] for p in info["spillover_pairs"]}
    assert len(listed) == np.count_nonzero(s - np.eye(len(s)))
    for (a, b), value in listed.items():
        assert s[sources.index(a), receivers.index(b)] == value
    # every plausible pair not involving DNA carries spillover
    for i, src in enumerate(parsed):
        for j, dst in enumerate(parsed):
            if i != j and src[0] != "Ir" and dst[0] != "Ir" and _kind(src, dst):
                assert s[i, j] > 0
    assert np.linalg.cond(s) < 1.5


def test_measured_counts_are_poisson_plus_background_plus_hot(info, spill):
    """measured - background - hot is a Poisson draw with mean row_factor * S^T x
    (Poisson mean = variance; Young, Gerbrands & van Vliet, Fundamentals of
    Image Processing)."""
    s = spill[2]
    for roi in info["rois"]:
        data, _ = _read(STACK / roi["file"])
        t = _truth(roi["name"])
        rest = data.astype(np.int64) - t["background"] - _hot_map(t["hot_pixels"], data.shape)
        assert rest.min() >= 0
        mean = np.tensordot(s, t["signal"].astype(np.float64), axes=(0, 0))
        mean *= t["row_factor"][None, :, None]
        expected, got = mean.sum(axis=(1, 2)), rest.sum(axis=(1, 2))
        assert np.all(np.abs(got - expected) <= 5 * np.sqrt(expected) + 1)
        bg_rate = t["background"].mean(axis=(1, 2)) / t["row_factor"].mean()
        n = data.shape[1] * data.shape[2]
        assert np.all(np.abs(bg_rate - t["background_rate"])
                      <= 5 * np.sqrt(t["background_rate"] / n))


def test_background_and_hot_pixels_in_stated_ranges(info):
    for roi in info["rois"]:
        t = _truth(roi["name"])
        assert np.all((t["background_rate"] >= 0.02) & (t["background_rate"] <= 0.3))
        hot = t["hot_pixels"]
        assert np.all((hot[:, 3] >= 150) & (hot[:, 3] <= 900))
        n_pix = roi["shape"][0] * roi["shape"][1]
        random_hot = hot[hot[:, 4] == 0]
        per_channel = np.bincount(random_hot[:, 0], minlength=len(info["channels"])) / n_pix
        assert np.all((per_channel > 0.3e-4) & (per_channel < 8e-4))
        persistent = hot[hot[:, 4] == 1]
        spots = {(y, x) for _, y, x, _, _ in persistent}
        for y, x in spots:
            assert set(persistent[(persistent[:, 1] == y) & (persistent[:, 2] == x), 0]) == \
                set(range(len(info["channels"])))


def test_failed_channel_has_zero_truth_and_only_ghosts(info, spill):
    (failed,) = info["failed"]
    names = info["channels"]
    c = names.index(failed)
    s = spill[2]
    assert failed not in info["estimable_sources"]
    sources = np.flatnonzero(s[:, c] > 0)
    sources = sources[sources != c]
    assert len(sources) >= 2
    for roi in info["rois"]:
        t = _truth(roi["name"])
        x = t["signal"].astype(np.float64)
        assert not np.any(x[c])
        data, _ = _read(STACK / roi["file"])
        rest = (data[c].astype(np.int64) - t["background"][c]
                - _hot_map(t["hot_pixels"], data.shape)[c])
        ghost = np.tensordot(s[:, c], x, axes=(0, 0)) * t["row_factor"][:, None]
        # the ghosts are really there, and are what is left (Poisson: 5 sigma)
        assert ghost.sum() > 1000
        assert abs(rest.sum() - ghost.sum()) <= 5 * np.sqrt(ghost.sum())
        # and they are only a few percent of the strongest source
        strongest = max(x[i].sum() for i in sources)
        assert rest.sum() < 0.05 * strongest


def test_striped_rows_are_low(info):
    striped = info["striped_roi"]
    for roi in info["rois"]:
        data, _ = _read(STACK / roi["file"])
        t = _truth(roi["name"])
        hot = _hot_map(t["hot_pixels"], data.shape)
        row = (data.astype(np.int64) - hot).sum(axis=(0, 2)).astype(float)
        local = np.array([np.median(np.delete(row[max(0, r - 6):r + 7], 6 if r >= 6 else r))
                          for r in range(len(row))])
        low = np.flatnonzero(row < 0.3 * local)
        if roi["name"] == striped:
            assert 1 <= len(roi["striped_rows"]) <= 5
            assert low.tolist() == roi["striped_rows"] == t["striped_rows"].tolist()
            assert np.all(t["row_factor"][low] <= 0.2)
        else:
            assert low.size == 0 and t["striped_rows"].size == 0


def test_dim_rare_and_speck_channels(info):
    names = info["channels"]
    (dim,), (rare,), (speck,) = info["dim"], info["rare"], info["specks"]
    for roi in info["rois"]:
        t = _truth(roi["name"])
        x = t["signal"].astype(np.float64)
        dim_values = x[names.index(dim)][x[names.index(dim)] > 0]
        assert 1.0 <= dim_values.mean() <= 3.0
        carriers = np.unique(t["cells"][x[names.index(rare)] > 0])
        assert 1 <= len(carriers) <= 10
        assert np.all(t["cell_type"][carriers] == 4)
        sp = x[names.index(speck)]
        # connected components by scipy.ndimage.label (4-connectivity, its default)
        labels, n = ndimage.label(sp > 0)
        sizes = np.bincount(labels.ravel())[1:]
        assert n == len(np.unique(t["specks"])) - 1 >= 10
        assert sizes.min() >= 2 and sizes.max() <= 6
        assert sp[sp > 0].min() >= 15  # bright
        for k, marker in enumerate(info["stains"]):
            if marker["role"] == "stain":
                assert x[k].max() >= 20


def test_controls_follow_the_spillover(info, spill):
    """In a single-stain control of channel i, receiver j's spot counts minus its
    background equal S[i, j] times channel i's (Chevrier et al., Cell Systems 2018:
    the ratio that defines spillover), within Poisson noise."""
    sources, receivers, s = spill
    with open(STACK / "controls" / "controls.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["channel"] for r in rows] == info["estimable_sources"]
    names = info["channels"]
    rate = np.array([info["background_rate"][n] for n in names])
    with np.load(STACK / "truth" / "controls.npz") as z:
        truth = {k: z[k] for k in z.files}
    for row in rows:
        data, _ = _read(STACK / "controls" / row["file"])
        assert data.dtype == np.float32
        i = names.index(row["channel"])
        spots = truth[f"{row['channel']}_spots"] > 0
        clean = data.astype(np.float64) - _hot_map(truth[f"{row['channel']}_hot_pixels"],
                                                   data.shape)
        totals = clean[:, spots].sum(axis=1) - rate * spots.sum()
        stained = totals[i]
        assert stained / spots.sum() > 100
        for j in range(len(names)):
            if j == i:
                continue
            expected = s[i, j] * stained
            tolerance = 5 * np.sqrt(expected + rate[j] * spots.sum()) + 0.05 * expected
            assert abs(totals[j] - expected) <= tolerance, (row["channel"], names[j])


def test_unseen_variants_in_memory(gen):
    names = ["Yb171", "Yb172", "Yb173", "Lu175", "Yb174", "Yb176", "Er168", "Tm169",
             "Pt195", "Pt196", "Ir191", "Ir193"]
    stains = gen.random_stains(names, np.random.default_rng(7), failed="Yb173", dim="Tm169",
                             rare="Pt195", specks="Lu175")
    s = gen.build_spillover(names, np.random.default_rng(8))
    assert s[names.index("Yb172"), names.index("Yb173")] > 0.01        # impurity
    assert s[names.index("Tm169"), names.index("Lu175")] == 0          # 169 + 16 = 185
    assert 0.003 <= s[names.index("Pt195"), names.index("Pt196")] <= 0.04
    counts, truth = gen.simulate_roi(np.random.default_rng(9), stains, s, (200, 232),
                                     n_striped_rows=2)
    again, _ = gen.simulate_roi(np.random.default_rng(9), stains, s, (200, 232),
                                n_striped_rows=2)
    assert counts.shape == (12, 200, 232) and np.array_equal(counts, again)
    assert not truth["signal"][names.index("Yb173")].any()
    assert truth["signal"][names.index("Yb174")].any()
    assert len(truth["striped_rows"]) == 2 and truth["failed"] == ["Yb173"]

    default = gen.default_stains()
    moved = gen.set_failed(default, "Nd148")
    assert [m.channel for m in moved if m.role == "failed"] == ["Nd148"]
    channels = [m.channel for m in moved]
    s2 = gen.build_spillover(channels, np.random.default_rng(1))
    counts, truth = gen.simulate_roi(np.random.default_rng(2), moved, s2, 96)
    assert counts.shape == (22, 96, 96)
    assert not truth["signal"][channels.index("Nd148")].any()
    assert truth["signal"][channels.index("Tb159")].any()


def test_plain_tiff_helper_writes_pages_without_ome(gen, tmp_path):
    stack = np.arange(3 * 20 * 24, dtype=np.uint16).reshape(3, 20, 24)
    path = tmp_path / "roi.tif"
    gen.write_plain_tiff(path, stack)
    with tifffile.TiffFile(path) as tif:
        assert not tif.is_ome and len(tif.pages) == 3
        assert tif.pages[0].description == ""
        back = np.stack([p.asarray() for p in tif.pages])
    assert np.array_equal(back, stack)


def test_size_budget():
    total = sum(p.stat().st_size for p in STACK.rglob("*")
                if p.is_file() and "__pycache__" not in p.parts)
    assert total <= 5_000_000
