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

import numpy as np
import pytest
from plexwash.qc.io import write_ome_tiff
from plexwash.qc.report import write_report
from plexwash.qc.run import Ledger
from plexwash.qc.run.batches import samples_csv_text
from plexwash.qc.table import SAMPLES_COPY, write_quality_table

N_ROIS, N_SLIDES = 500, 20
CHANNELS = [f"Ch{k:02d}" for k in range(12)]
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
#: The page's weight limit for 500 ROIs (issue 16: at most about 20 MB).
MAX_BYTES = 20_000_000


def _roi_id(k: int) -> str:
    return f"slide{k % N_SLIDES:02d}/r{k:03d}"


@pytest.fixture(scope="module")
def big_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("big") / "run"
    out.mkdir()
    rng = np.random.default_rng(500)
    ledger = Ledger(out / "ledger.jsonl")
    samples = {}
    for k in range(N_ROIS):
        rid = _roi_id(k)
        batch = f"B{1 + k % 3}"
        samples[rid] = {"batch": batch, "patient": f"P{k % 40}"}
        bright = 2.0 if batch == "B3" else 1.0
        stack = rng.poisson(3.0 * bright, (len(CHANNELS), 24, 24)).astype(np.float32)
        write_ome_tiff(out / f"{rid}.ome.tiff", stack, CHANNELS)
        quality = [{"roi": rid, "channel": c, "stage": stage,
                    "sbr": float(rng.lognormal(2.0, 0.3)) * (bright if j < 3 else 1.0),
                    "snr": float(rng.lognormal(1.0, 0.3)), "background_mean": float(rng.normal(3, 0.2)),
                    "p99": float(rng.lognormal(3.0, 0.2)) * (bright if j < 3 else 1.0),
                    "flags": ["low-sbr"] if rng.random() < 0.02 else []}
                   for stage in ("raw", "washed") for j, c in enumerate(CHANNELS)]
        ledger.append({"roi": rid, "status": "done" if k != 7 else "failed",
                       "error": "broken file" if k == 7 else None,
                       "input": str(out / "gone" / f"{rid}.ome.tiff"), "output": f"{rid}.ome.tiff",
                       "channels": CHANNELS, "labels": CHANNELS, "shape": [len(CHANNELS), 24, 24],
                       "median_sbr": {"raw": 7.0, "washed": 8.0}, "seconds": 0.1,
                       "removed_fraction": {"speckle": {c: float(rng.uniform(0, 0.05)) for c in CHANNELS}},
                       "sample": samples[rid], "quality": quality})
    (out / SAMPLES_COPY).write_text(samples_csv_text(("batch", "patient"), samples))
    write_quality_table(out)
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
        assert (f'title="{_roi_id(k)}"' in page) == (k != 7)  # a tile per washed ROI
    # one heatmap image per page of at most 100 ROIs, grouped by batch (3 batches of ~167)
    assert page.count('alt="SBR heatmaps raw and washed') == 6
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
        assert (f'data-roi="{_roi_id(k)}"' in dom) == (k != 7)  # the failed ROI has no tile
        assert f"<td>{_roi_id(k)}</td>" in dom  # the summary table, as the browser built it
    assert dom.count('<table class="sortable"') >= 4
