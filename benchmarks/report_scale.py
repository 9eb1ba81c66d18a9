"""Benchmark: writing the report of a 500-ROI x 12-channel run folder.

Run: ``python benchmarks/report_scale.py [--rois 500] [--repeats 1] [--keep DIR]``

The run folder is the synthetic one of ``tests/test_report_scale.py`` (ledger records,
quality rows, tiny washed stacks in 20 slide folders, three batches): the report, not the
wash, is measured. Prints the time to write ``report.html`` (median of ``--repeats``), its
ratio to a floor measured in the same run (what any report must read: the ledger parsed as
JSON, ``quality.csv`` parsed as CSV, every washed stack decoded by ``tifffile.imread``), the
time of its parts (heatmaps, contact sheets, the rest), its size, and the load average,
which matters on a shared machine: compare figures taken at similar load.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from _common import median_time  # noqa: E402
from plexwash.qc.report import write_report  # noqa: E402

from tests.report_cohort import N_ROIS, build_run_folder  # noqa: E402

#: The report's parts timed on their own: functions of plexwash.qc.report.html.
PARTS = ("_gather", "_section_sbr", "_section_removed", "section_spillover", "section_sheets",
         "_section_thumbnails")


def _parts(out: Path, target: Path) -> dict[str, float]:
    """Seconds spent in each of the report's main parts during one more write."""
    from plexwash.qc.report import html

    spent = {name: 0.0 for name in PARTS if hasattr(html, name)}
    saved = {name: getattr(html, name) for name in PARTS if hasattr(html, name)}  # older code: fewer

    def timed(name, function):
        def wrapper(*args, **kwargs):
            started = time.perf_counter()
            try:
                return function(*args, **kwargs)
            finally:
                spent[name] += time.perf_counter() - started
        return wrapper

    try:
        for name, function in saved.items():
            setattr(html, name, timed(name, function))
        started = time.perf_counter()
        write_report(out, output=target)
        spent["whole write"] = time.perf_counter() - started
    finally:
        for name, function in saved.items():
            setattr(html, name, function)
    return spent


def _floor(out: Path) -> None:
    """Read what the report reads, with the plainest tools: no parsing beyond that."""
    import csv
    import json

    import tifffile

    with open(out / "ledger.jsonl", encoding="utf-8") as fh:
        records = [json.loads(line) for line in fh if line.strip()]
    with open(out / "quality.csv", newline="", encoding="utf-8") as fh:
        list(csv.reader(fh))
    for record in records:
        if record.get("status") == "done":
            tifffile.imread(out / record["output"])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rois", type=int, default=N_ROIS)
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--keep", type=Path, help="build (or reuse) the run folder here")
    args = parser.parse_args(argv)
    base = args.keep or Path(tempfile.mkdtemp(prefix="plexwash-report-"))
    out = base / f"run{args.rois}"
    if not (out / "ledger.jsonl").is_file():
        started = time.perf_counter()
        build_run_folder(out, args.rois)
        print(f"run folder of {args.rois} ROIs built in {time.perf_counter() - started:.1f} s: {out}")
    target = base / "report.html"
    load = os.getloadavg()
    seconds = median_time(lambda: write_report(out, output=target), args.repeats)
    floor = median_time(lambda: _floor(out), args.repeats)
    size = target.stat().st_size
    parts = _parts(out, target)
    load_after = os.getloadavg()
    print(f"report of {args.rois} ROIs x 12 channels: written in {seconds:.2f} s "
          f"(median of {args.repeats}), {size / 1e6:.2f} MB")
    print(f"floor (read ledger, quality.csv and every washed stack): {floor:.2f} s; "
          f"report / floor = {seconds / floor:.1f}x")
    print("parts (one more write): "
          + ", ".join(f"{name} {value:.2f} s" for name, value in parts.items()))
    print(f"load average before {load[0]:.1f}, after {load_after[0]:.1f} "
          f"(1 min; {os.cpu_count()} CPUs)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
