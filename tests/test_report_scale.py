"""A report for 500 ROIs: one light page that a real browser (headless Chromium) opens quickly.

The run folder is synthetic (ledger records, quality rows, tiny washed stacks, a sample sheet):
the report, not the wash, is under test here.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import time
from pathlib import Path

import pytest
from plexwash.qc.report import write_report

from .report_cohort import FAILED, N_ROIS
from .report_cohort import build_run_folder as _build
from .report_cohort import roi_id as _roi_id

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
#: The page's weight limit for 500 ROIs (issue 16: at most about 20 MB).
MAX_BYTES = 20_000_000


@pytest.fixture(scope="module")
def big_run(tmp_path_factory):
    out = _build(tmp_path_factory.mktemp("big") / "run")
    started = time.perf_counter()
    report = write_report(out)
    print(f"\n500-ROI report written in {time.perf_counter() - started:.1f} s, "
          f"{report.stat().st_size / 1e6:.2f} MB")
    return report


def test_500_roi_report_is_light_and_complete(big_run):
    page = big_run.read_text(encoding="utf-8")
    assert big_run.stat().st_size <= MAX_BYTES
    assert "Showing the first" not in page  # nothing is cut off
    for k in range(N_ROIS):
        assert f"<td>{_roi_id(k)}</td>" in page  # every ROI in the summary table
        assert (f'title="{_roi_id(k)}"' in page) == (k != FAILED)  # a tile per washed ROI
    # one heatmap figure per page of at most 100 ROIs, grouped by batch (3 batches of ~167),
    # each with a raw and a washed panel; together the pages hold every washed ROI once
    figures = re.findall(r'<figure class="heat" role="group" aria-label="SBR heatmaps raw and washed'
                         r'.*?</figure>', page, flags=re.S)
    assert len(figures) == 6
    shown = []
    for figure in figures:
        assert figure.count("<img") == 2
        assert ': raw"' in figure and ': washed"' in figure
        rows = re.search(r'<div class="hm-rows">(.*?)</div>', figure).group(1).split("<br>")
        assert 0 < len(rows) <= 100
        shown += rows
    assert sorted(shown) == sorted(_roi_id(k) for k in range(N_ROIS) if k != FAILED)
    # one colour scale shared by every page: the same limits under each figure
    scales = {re.search(r'<div class="hm-ticks">.*?</div>', f).group(0) for f in figures}
    assert len(scales) == 1
    assert 'id="batches"' in page and "batch-effect" in page


@pytest.mark.slow
@pytest.mark.skipif(not Path(CHROMIUM).exists(),
                    reason="no chromium binary (tests/run_all.sh installs the Debian package chromium)")
def test_500_roi_report_in_headless_chromium(big_run, tmp_path):
    command = [CHROMIUM, "--headless", "--disable-gpu", "--no-sandbox", "--disable-quic",
               "--no-first-run", "--disable-background-networking", "--disable-component-update",
               "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
               "--enable-logging=stderr", "--v=0", "--dump-dom", big_run.as_uri()]
    started = time.perf_counter()
    done = subprocess.run(command, timeout=180, capture_output=True, text=True)
    wall = time.perf_counter() - started
    assert done.returncode == 0, done.stderr[-2000:]
    dom = done.stdout
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    assert console == []  # no script error, no console message of any kind
    loaded = re.search(r'data-loaded-ms="(\d+)"', dom)
    assert loaded, "the load event never fired"
    print(f"\nChromium: load event after {int(loaded.group(1))} ms; whole run {wall:.1f} s")
    assert int(loaded.group(1)) < 15_000  # a few seconds on a shared CI machine
    for k in range(N_ROIS):
        assert (f'data-roi="{_roi_id(k)}"' in dom) == (k != FAILED)  # the failed ROI has no tile
        assert f"<td>{_roi_id(k)}</td>" in dom  # the summary table, as the browser built it
    assert dom.count('<table class="sortable"') >= 4
