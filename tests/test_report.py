"""The cohort report: one self-contained HTML file, parsed and rendered in headless Chromium."""

from __future__ import annotations

import base64
import hashlib
import io
import json
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.errors import InputError
from plexwash.qc.report import (
    CAUTIONS,
    combined_removed_fraction,
    downsample,
    png_grey,
    robust_range,
    to_grey,
    write_report,
)
from plexwash.qc.run import Ledger, read_ledger, run_cohort

SECTIONS = ("cautions", "summary", "sbr", "batches", "flags", "outliers", "removed", "spillover",
            "sheets", "thumbnails", "provenance")
CHANNELS = ["Nd143", "Nd144", "Nd145", "Nd146", "Gd160", "Ir191"]
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"


class _Page(HTMLParser):
    """Collects ids, images, every attribute value and the text of a page."""

    def __init__(self):
        super().__init__()
        self.ids, self.images, self.attributes, self.tags, self.text = set(), [], [], [], []
        self.styles = []
        self._in_style = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        if "id" in attrs:
            self.ids.add(attrs["id"])
        if tag == "img":
            self.images.append(attrs)
        self.attributes.extend((tag, k, v or "") for k, v in attrs.items())
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False

    def handle_data(self, data):
        (self.styles if self._in_style else self.text).append(data)


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory, generator):
    """A run of three small ROIs, one of them unreadable (so the report shows a failure)."""
    stack = tmp_path_factory.mktemp("stack")
    rng = np.random.default_rng(3)
    stains = generator.random_stains(CHANNELS, rng, failed="Gd160")
    generator.simulate_cohort(stack, random_state=3, n_rois=3, size=72, control_size=40,
                              stains=stains)
    broken = stack / "cohort" / "roi_03.ome.tiff"
    broken.write_bytes(broken.read_bytes()[:900])
    out = tmp_path_factory.mktemp("run")
    run_cohort(stack / "cohort", out, spillover=stack / "truth" / "spillover.csv",
               stains=stack / "stains.csv", progress=False)
    return out


def test_report_has_every_section_and_the_cautions(run_dir):
    page = _parse(run_dir / "report.html")
    assert set(SECTIONS) <= page.ids
    text = " ".join(" ".join(page.text).split())
    for caution in CAUTIONS:
        assert " ".join(caution.split()) in text
    assert "not for clinical diagnosis" in text
    assert "1.3.5.17" in text and "3.5" in text  # the outlier rule is named with its source
    assert "failed" in text and "truncated" in text  # the unreadable ROI and its error


def test_report_images_are_embedded_pngs(run_dir):
    from PIL import Image

    page = _parse(run_dir / "report.html")
    # 2 SBR panels, a removed-fraction panel per step, spillover, 2 ROIs x 6 channels x 3 thumbnails
    assert len(page.images) >= 3 + 2 * len(CHANNELS) * 3
    prefix = "data:image/png;base64,"
    for img in page.images:
        assert img["src"].startswith(prefix)
        image = Image.open(io.BytesIO(base64.b64decode(img["src"][len(prefix):])))  # reference decoder
        image.verify()
        assert img.get("alt")


def test_report_has_no_external_reference(run_dir):
    page = _parse(run_dir / "report.html")
    assert not {"link", "iframe", "object", "embed"} & set(page.tags)
    assert page.tags.count("script") == 1  # the inline table script, no src
    assert not any(tag == "script" and key == "src" for tag, key, _ in page.attributes)
    for tag, key, value in page.attributes:
        if key in ("src", "href", "action", "srcset", "poster", "data"):
            assert value.startswith(("data:", "#")), (tag, key, value[:60])
    css = " ".join(page.styles)
    assert css.count("url(") == css.count("url(data:image/png;base64,")  # contact-sheet sprites
    assert "@import" not in css and "@font-face" not in css
    raw = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "http://" not in raw and "https://" not in raw


def test_report_provenance_lists_hashes(run_dir):
    page_text = (run_dir / "report.html").read_text(encoding="utf-8")
    records = [r for r in read_ledger(run_dir) if r["status"] == "done"]
    assert len(records) == 2
    for rec in records:
        # reference: hashlib.sha256 of the files themselves
        assert hashlib.sha256(Path(rec["input"]).read_bytes()).hexdigest() in page_text
        assert hashlib.sha256((run_dir / rec["output"]).read_bytes()).hexdigest() in page_text
    assert rec["recipe_sha256"] in page_text
    from plexwash.qc import __version__

    assert f"plexwash {__version__}" in page_text


def test_report_is_small(run_dir):
    assert (run_dir / "report.html").stat().st_size < 1_500_000


def test_report_regenerates_to_another_file(run_dir, tmp_path):
    target = write_report(run_dir, output=tmp_path / "again.html")
    assert target == tmp_path / "again.html"
    assert set(SECTIONS) <= _parse(target).ids


def test_report_without_a_ledger_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="ledger"):
        write_report(tmp_path)


def test_report_of_a_ledger_alone(tmp_path):
    """A folder holding only a ledger (no quality.csv, recipe or images) still reports."""
    rows = [{"roi": "a", "channel": "CD3", "stage": "raw", "sbr": 4.0, "snr": 2.0,
             "flags": ["low-sbr"]}]
    Ledger(tmp_path / "ledger.jsonl").append({"roi": "a", "status": "done", "quality": rows,
                                              "removed_fraction": {"speckle": {"CD3": 0.1}},
                                              "input": str(tmp_path / "gone.ome.tiff"),
                                              "output": "gone.ome.tiff", "channels": ["CD3"]})
    page = _parse(write_report(tmp_path))
    assert set(SECTIONS) <= page.ids
    text = " ".join(page.text)
    assert "low-sbr" in text and "No spillover matrix" in text and "not shown" in text


@pytest.mark.slow
@pytest.mark.skipif(not Path(CHROMIUM).exists(), reason="chromium is not installed")
def test_report_renders_in_headless_chromium(run_dir, tmp_path):
    from PIL import Image

    shot = tmp_path / "shot.png"
    command = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking", "--disable-component-update",
               "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}",
               "--window-size=1200,1600", (run_dir / "report.html").as_uri()]
    subprocess.run(command, check=True, timeout=120, capture_output=True)
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape == (1600, 1200)
    assert pixels.std() > 20  # not blank: header band, text and plots
    assert (pixels < 80).mean() > 0.02 and (pixels > 200).mean() > 0.3


# --------------------------------------------------------------------------- helpers


def test_png_grey_decodes_to_the_same_pixels():
    from PIL import Image

    rng = np.random.default_rng(0)
    image = rng.integers(0, 256, (37, 53), dtype=np.uint8)
    decoded = np.asarray(Image.open(io.BytesIO(png_grey(image))))  # reference: Pillow's decoder
    np.testing.assert_array_equal(decoded, image)
    assert Image.open(io.BytesIO(png_grey(image))).mode == "L"


def test_downsample_matches_block_reduce():
    from skimage.measure import block_reduce

    rng = np.random.default_rng(1)
    stack = rng.random((2, 50, 30))
    # reference: skimage.measure.block_reduce with np.mean over 2 x 2 blocks (trimmed to whole blocks)
    expected = np.stack([block_reduce(c[:50, :30], (2, 2), np.mean) for c in stack])
    np.testing.assert_allclose(downsample(stack, 25), expected)
    import dask.array as da

    lazy = da.from_array(stack, chunks=(1, 16, 16))
    np.testing.assert_allclose(downsample(lazy, 25), expected)


def test_contrast_and_grey_mapping():
    image = np.arange(1001.0)
    lo, hi = robust_range(image)
    # reference: numpy.percentile (linear interpolation) at 1 and 99.5
    assert (lo, hi) == (10.0, 995.0)
    grey = to_grey(np.array([lo - 5, lo, (lo + hi) / 2, hi, hi + 5]), lo, hi)
    assert grey.tolist() == [0, 0, 128, 255, 255]
    assert robust_range(np.zeros(9)) == (0.0, 1.0)


def test_combined_removed_fraction():
    assert combined_removed_fraction([0.1, 0.2, 0.5]) == pytest.approx(1 - 0.9 * 0.8 * 0.5)
    assert combined_removed_fraction([]) == 0.0


def _refuse_constant(name):
    raise ValueError(f"not strict JSON: {name}")


def test_report_json_safe_ledger(run_dir):
    # strict JSON (RFC 8259 has no NaN or Infinity): json.loads accepts them silently,
    # so any such constant raises here
    with pytest.raises(ValueError, match="NaN"):
        json.loads('{"a": NaN}', parse_constant=_refuse_constant)
    lines = (run_dir / "ledger.jsonl").read_text().splitlines()
    assert lines
    for line in lines:
        assert isinstance(json.loads(line, parse_constant=_refuse_constant), dict)


def test_png_rgb_decodes_to_the_same_pixels_with_either_filter():
    from PIL import Image
    from plexwash.qc.report.thumbnails import png_rgb

    rng = np.random.default_rng(1)
    noisy = rng.integers(0, 256, (21, 34, 3), dtype=np.uint8)  # "None" compresses better
    smooth = np.repeat(np.repeat(noisy[:3, :4], 12, axis=0), 9, axis=1)  # "Up" compresses better
    for image in (noisy, smooth, noisy[:1]):
        decoded = Image.open(io.BytesIO(png_rgb(image)))  # reference: Pillow's decoder
        assert decoded.mode == "RGB"
        np.testing.assert_array_equal(np.asarray(decoded), image)
    for image in (noisy[..., 0], smooth[..., 0]):
        np.testing.assert_array_equal(np.asarray(Image.open(io.BytesIO(png_grey(image)))), image)


def test_heatmap_colours_are_those_matplotlib_picks():
    import matplotlib as mpl
    from plexwash.qc.report.heatmaps import MISSING_RGB, colour_cells

    rng = np.random.default_rng(2)
    grid = rng.uniform(-0.5, 3.5, (40, 7))  # beyond both limits too
    grid[3, 2] = np.nan
    got = colour_cells(grid, 0.0, 3.0, "cividis")
    # reference: matplotlib's Normalize + Colormap lookup, what imshow(vmin, vmax) draws
    rgba = mpl.colormaps["cividis"](mpl.colors.Normalize(0.0, 3.0)(np.ma.masked_invalid(grid)))
    expected = np.round(255 * rgba[..., :3]).astype(np.uint8)
    expected[3, 2] = MISSING_RGB
    np.testing.assert_array_equal(got, expected)


def test_heatmap_figure_has_every_row_column_and_a_shared_scale():
    from PIL import Image
    from plexwash.qc.report.heatmaps import ROW_PX, column_px, heatmap_html

    rows = [f"slide1/r{k}" for k in range(5)]
    raw, washed = np.arange(15.0).reshape(5, 3), np.full((5, 2), np.nan)
    html = heatmap_html([("raw", raw, ["A", "B", "C"]), ("washed", washed, ["A", "B"]),
                         ("none", np.zeros((5, 0)), [])], rows,
                        vmin=0.0, vmax=14.0, cmap="cividis", label="log10 SBR", alt="SBR <page>")
    assert 'aria-label="SBR &lt;page&gt;"' in html and html.count("<img") == 2
    assert "slide1/r0<br>slide1/r1<br>slide1/r2<br>slide1/r3<br>slide1/r4" in html
    assert "<span>C</span>" in html and "not measured" in html
    assert "<span>0</span>" in html and "<span>14</span>" in html and "log10 SBR" in html
    first = html.split('src="data:image/png;base64,')[1].split('"')[0]
    image = np.asarray(Image.open(io.BytesIO(base64.b64decode(first))))  # reference: Pillow
    width = column_px(3)
    assert image.shape == (5 * ROW_PX, 3 * width, 3)
    assert f'width="{3 * width}" height="{5 * ROW_PX}"' in html
    # every cell is a solid block; the first and last cells take the ends of the colour map
    for i in range(5):
        for j in range(3):
            block = image[i * ROW_PX:(i + 1) * ROW_PX, j * width:(j + 1) * width]
            assert (block == block[0, 0]).all()
    assert not np.array_equal(image[0, 0], image[-1, -1])


def test_read_thumbnail_is_the_block_mean_of_every_plane(tmp_path):
    import tifffile
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.report.thumbnails import block_mean, read_thumbnail
    from skimage.measure import block_reduce

    rng = np.random.default_rng(4)
    stack = rng.gamma(2.0, 3.0, (3, 250, 190)).astype(np.float32)
    path = tmp_path / "s.ome.tiff"
    write_ome_tiff(path, stack, ["A", "B", "C"])
    got = read_thumbnail(path, 96)
    # reference: tifffile.imread of the whole stack, skimage.measure.block_reduce with np.mean
    # over 3 x 3 blocks (ceil(250 / 96) = 3), trimmed to whole blocks
    whole = tifffile.imread(path)
    expected = np.stack([block_reduce(c[:249, :189].astype(np.float64), (3, 3), np.mean) for c in whole])
    assert got.shape == (3, 83, 63)
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    np.testing.assert_allclose(downsample(stack, 96), expected, rtol=1e-12)
    ints = rng.integers(0, 60000, (7, 9), dtype=np.uint16)
    np.testing.assert_allclose(block_mean(ints, 2), block_reduce(ints[:6, :8].astype(float), (2, 2), np.mean))
    # not a (C, Y, X) TIFF, not a TIFF, not there: None (the caller reads it the careful way)
    tifffile.imwrite(tmp_path / "zcyx.tiff", np.ones((2, 2, 8, 8), np.float32), metadata={"axes": "ZCYX"})
    (tmp_path / "text.tiff").write_text("not an image")
    for other in ("zcyx.tiff", "text.tiff", "gone.tiff"):
        assert read_thumbnail(tmp_path / other) is None
    bad = stack.copy()
    bad[1, 5, 5] = np.nan
    write_ome_tiff(tmp_path / "nan.ome.tiff", bad, ["A", "B", "C"])
    assert read_thumbnail(tmp_path / "nan.ome.tiff") is None


def test_colour_tables_are_matplotlibs():
    import matplotlib as mpl
    from plexwash.qc.report.colour_maps import TABLES
    from plexwash.qc.report.heatmaps import colour_table

    assert {"cividis", "PuBuGn", "YlOrBr"} <= set(TABLES)
    for name in (*TABLES, "viridis"):  # viridis: not kept, read from matplotlib
        # reference: matplotlib's colour map at its 256 entries, rounded to 8 bits
        expected = np.round(255.0 * mpl.colormaps[name](np.arange(256))[:, :3]).astype(np.uint8)
        np.testing.assert_array_equal(colour_table(name), expected)


def test_spillover_heatmap_writes_each_value_in_its_coloured_cell():
    import re

    from plexwash.qc.report.heatmaps import VALUE_CELLS_MAX, colour_cells
    from plexwash.qc.report.plots import spillover_html

    off = np.array([[0.0, 0.012, 0.0], [0.0004, 0.0, 0.03], [0.005, 0.0, 0.0]])
    html = spillover_html(off, ["A", "B<", "C"])
    assert 'aria-label="spillover matrix heatmap"' in html and "<span>B&lt;</span>" in html
    cells = re.findall(r'<td style="background:#([0-9a-f]{6})(;color:#fff)?">([^<]*)</td>', html)
    assert len(cells) == 9
    # values in percent from 0.1 up; white ink from 60 % of the largest (3 %) up
    assert [text for _, _, text in cells] == ["", "1.2", "", "", "", "3.0", "0.5", "", ""]
    assert [bool(ink) for _, ink, _ in cells] == [False] * 5 + [True] + [False] * 3
    grid = 100 * off
    np.fill_diagonal(grid, np.nan)
    expected = colour_cells(grid, 0.0, 3.0, "YlOrBr").reshape(9, 3)  # grey diagonal included
    assert [bytes.fromhex(h) for h, _, _ in cells] == [bytes(int(v) for v in rgb) for rgb in expected]
    assert "<span>0</span>" in html and "<span>3</span>" in html  # the colour scale
    # beyond VALUE_CELLS_MAX channels: one heatmap image, labels in HTML, no values written
    n = VALUE_CELLS_MAX + 6
    big = spillover_html(np.full((n, n), 0.01), [f"c{k}" for k in range(n)])
    assert big.count("<img") == 1 and "<td" not in big and "<span>c35</span>" in big
