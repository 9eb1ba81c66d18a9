"""Speed of ``plexwash run`` as a user feels it: whole processes against their I/O floor.

Dense data (every channel has signal, see ``_dense.py``); each figure is a whole
``plexwash run`` process (start-up, imports, hashing, quality, report included), medians
of ``--repeats``; ratios are taken within this one run. Parts (``--parts``, default all):

- ``dense``: one 36 x 1008 x 1008 float32 ROI, against a process that reads it with
  tifffile and writes it back with the recipe's compression and tile size
  (target <= 2.5x, must be < 3x);
- ``small``: 200 ROIs of 36 x 96 x 96 (cut from the dense one): fixed cost per ROI =
  (run of N ROIs - run of 1 ROI) / (N - 1) (target <= 0.1 s, must be < 0.25 s), beside the
  floor's (the read + write process on the same ROIs) and the ledger's median seconds per
  stage (quality = raw + washed, and its share of an ROI's task);
- ``resume``: rerun of a finished 24-ROI cohort (target <= 1.5 s including start-up,
  must be < 2.5 s) against a floor process (Python start-up, a stat of both folders, the
  ledger read), and the same with ``--verify`` (re-hashes everything);
- ``workers``: 8 ROIs of 36 x 504 x 504, the default and ``--workers 1`` (a single
  worker process) against ``--workers 2`` (target: >= 1.7x a single worker's throughput on
  2 cores, also printed against the default). Two ratios each: the whole process (wall
  time of ``plexwash run``, start-up and closing report included) and the ROI throughput
  from the ledger (ROIs per second between the first ROI's start and the last ROI's
  finish: the washing alone). Each mode's CPU time over its wall time is printed too; it
  counts the processes the run waits for, not the pool's workers (children of the fork
  server), so for the pool it is the run's own process only.

The machine may be shared: the load average is printed with each part.

``--baseline DIR`` also times another plexwash in the same run, interleaved: DIR holds
``plexwash/qc`` (and ``plexwash/plugin``) of another checkout, e.g.
``mkdir -p DIR/plexwash && git archive main qc plugin example_stack | tar -x -C DIR/plexwash && touch
DIR/plexwash/__init__.py``; its processes run with ``PYTHONPATH=DIR``.

    python benchmarks/run_cohort.py [--repeats 3] [--parts dense,small,resume,workers] [--small 200]
                                    [--baseline DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import tempfile
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from _dense import (  # noqa: E402
    dense_counts,
    floor_process,
    floor_seconds,
    load,
    plexwash_process,
    plexwash_seconds,
    write_roi,
    write_spillover,
)

PARTS = ("dense", "small", "resume", "workers")


def _median(fn, repeats: int) -> tuple[float, list[float]]:
    runs = [fn() for _ in range(repeats)]
    return statistics.median(runs), runs


BASELINE: dict = {}


def _run(cohort: Path, out: Path, spill: Path, *extra: str, fresh: bool = True,
         baseline: bool = False) -> float:
    if fresh:
        shutil.rmtree(out, ignore_errors=True)
    return plexwash_seconds(["run", str(cohort), "-o", str(out), "--spillover", str(spill),
                             "--quiet", *extra], env=BASELINE if baseline else None)


def _process(cohort: Path, out: Path, spill: Path, *extra: str, env=None) -> tuple[float, float]:
    """Wall and CPU seconds of one fresh ``plexwash run`` process (its workers included)."""
    shutil.rmtree(out, ignore_errors=True)
    wall, cpu, _ = plexwash_process(["run", str(cohort), "-o", str(out), "--spillover", str(spill),
                                     "--quiet", *extra], env=env)
    return wall, cpu


def _ledger_throughput(run: Path) -> float:
    """ROIs per second of a finished run from its ledger: done ROIs over the time between
    the first ROI's start and the last ROI's finish (start-up and report left out)."""
    import datetime
    import json

    records = [json.loads(line) for line in (run / "ledger.jsonl").read_text().splitlines() if line]
    records = [r for r in records if r.get("status") == "done"]

    def when(text):
        return datetime.datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()

    span = max(when(r["finished"]) for r in records) - min(when(r["started"]) for r in records)
    return len(records) / max(span, 1e-9)


def _both(label: str, ours: list[float], theirs: list[float], floor: float | None = None) -> None:
    """Print our median, the baseline's (when timed) and their ratios to the floor."""
    for name, runs in (("this checkout", ours), ("baseline", theirs)):
        if not runs:
            continue
        median = statistics.median(runs)
        ratio = f"   {label} = {median / floor:.2f}x" if floor else ""
        print(f"  {name:14s} median {median:6.2f} s  runs {_list(runs)}{ratio}")


def _tiles(counts: np.ndarray, edge: int, n: int) -> list[np.ndarray]:
    """n (C, edge, edge) pieces of the stack (flipped copies once the grid is used up)."""
    grid = [counts[:, y:y + edge, x:x + edge] for y in range(0, counts.shape[1] - edge + 1, edge)
            for x in range(0, counts.shape[2] - edge + 1, edge)]
    out = []
    k = 0
    while len(out) < n:
        piece = grid[k % len(grid)]
        flips = k // len(grid)
        if flips % 2:
            piece = piece[:, ::-1]
        if (flips // 2) % 2:
            piece = piece[:, :, ::-1]
        out.append(np.ascontiguousarray(piece))
        k += 1
    return out


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--parts", default=",".join(PARTS))
    parser.add_argument("--small", type=int, default=200, help="ROIs of the fixed-cost part")
    parser.add_argument("--resume-rois", type=int, default=24)
    parser.add_argument("--channels", type=int, default=36)
    parser.add_argument("--size", type=int, default=1008)
    parser.add_argument("--baseline", type=Path, help="folder holding another checkout as plexwash/qc")
    args = parser.parse_args(argv)
    if args.baseline:
        BASELINE["PYTHONPATH"] = str(args.baseline.resolve())
    parts = [p.strip() for p in args.parts.split(",") if p.strip()]
    unknown = set(parts) - set(PARTS)
    if unknown:
        parser.error(f"unknown parts {sorted(unknown)}; choose from {', '.join(PARTS)}")

    print(f"before: {load()}")
    tmp = Path(tempfile.mkdtemp(prefix="plexwash-runbench-"))
    try:
        counts, names, spill = dense_counts(args.channels, args.size)
        spill_csv = write_spillover(tmp / "spillover.csv", spill, names)
        # warm-up: numba caches, the file cache
        warm = _tiles(counts, 96, 1)[0]
        write_roi(tmp / "warm" / "w.ome.tiff", warm, names)
        _run(tmp / "warm", tmp / "warm-run", spill_csv)
        if BASELINE:
            _run(tmp / "warm", tmp / "warm-run", spill_csv, baseline=True)

        if "dense" in parts:
            roi = write_roi(tmp / "dense" / "dense.ome.tiff", counts, names)
            print(f"\n[dense] one ROI {counts.shape[0]} x {counts.shape[1]} x {counts.shape[2]} float32: "
                  f"{counts.nbytes / 1e6:.0f} MB of pixels, {roi.stat().st_size / 1e6:.0f} MB on disk")
            floors, runs, base = [], [], []
            for k in range(args.repeats):  # interleaved, so all see the same load
                floors.append(floor_process([(roi, tmp / f"floor-{k}.ome.tiff")]))
                runs.append(_process(roi.parent, tmp / "dense-run", spill_csv))
                if BASELINE:
                    base.append(_process(roi.parent, tmp / "dense-run", spill_csv, env=BASELINE))
            floor, run = (statistics.median(w for w, _ in r) for r in (floors, runs))
            floor_cpu, run_cpu = (statistics.median(c for _, c in r) for r in (floors, runs))
            print(f"floor (read + write, one process)  median {floor:6.2f} s  runs {_list(w for w, _ in floors)}"
                  f"   CPU {_list(c for _, c in floors)} s")
            print("plexwash run")
            _both("run / floor", [w for w, _ in runs], [w for w, _ in base], floor)
            for name, timed in (("this checkout", runs), ("baseline", base)):
                if timed:
                    cpu = statistics.median(c for _, c in timed)
                    print(f"  {name:14s} CPU median {cpu:6.2f} s   CPU run / CPU floor = {cpu / floor_cpu:.2f}x")
            print(f"run / floor = {run / floor:.2f}x wall, {run_cpu / floor_cpu:.2f}x CPU   "
                  f"(target <= 2.5x, must be < 3x)   {load()}")

        if "small" in parts:
            _small_part(tmp, counts, names, spill_csv, args)

        if "resume" in parts:
            _resume_part(tmp, counts, names, spill_csv, args)

        if "workers" in parts:
            cohort = tmp / "eight"
            for k, piece in enumerate(_tiles(counts, args.size // 2, 8)):
                write_roi(cohort / f"roi_{k}.ome.tiff", piece, names)
            modes = {"default": (), "--workers 1": ("--workers", "1"), "--workers 2": ("--workers", "2")}
            timed = {name: [] for name in modes}
            rates = {name: [] for name in modes}
            for _ in range(args.repeats):  # interleaved, so all see the same load
                for name, extra in modes.items():
                    timed[name].append(_process(cohort, tmp / "eight-run", spill_csv, *extra))
                    rates[name].append(_ledger_throughput(tmp / "eight-run"))
            wall = {name: statistics.median(w for w, _ in runs) for name, runs in timed.items()}
            rate = {name: statistics.median(r) for name, r in rates.items()}
            print(f"\n[workers] 8 ROIs of {args.channels} x {args.size // 2} x {args.size // 2}")
            for name, runs in timed.items():
                print(f"{name:12s} whole process median {wall[name]:6.2f} s  runs {_list(w for w, _ in runs)}"
                      f"   CPU / wall (workers not counted) {_list(c / w for w, c in runs)}"
                      f"   ledger throughput {rate[name]:.3f} ROI/s (runs {_list(rates[name])})")
            print(f"whole process (wall time, start-up and report included): --workers 2 / --workers 1 = "
                  f"{wall['--workers 1'] / wall['--workers 2']:.2f}x, --workers 2 / default = "
                  f"{wall['default'] / wall['--workers 2']:.2f}x")
            print(f"ROI throughput (ledger, first start to last finish): --workers 2 / --workers 1 = "
                  f"{rate['--workers 2'] / rate['--workers 1']:.2f}x (target >= 1.7x: a single worker's "
                  f"throughput), --workers 2 / default = {rate['--workers 2'] / rate['default']:.2f}x   {load()}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"\nafter: {load()}")


def _small_part(tmp: Path, counts, names, spill_csv: Path, args) -> None:
    """Fixed cost per small ROI: (run of N - run of 1) / (N - 1), beside the same for the floor
    (and for the baseline, its runs interleaved with ours)."""
    cohort = tmp / "small"
    pieces = _tiles(counts, 96, args.small)
    for k, piece in enumerate(pieces):
        write_roi(cohort / f"roi_{k:04d}.ome.tiff", piece, names)
    one = tmp / "one"
    write_roi(one / "roi_0000.ome.tiff", pieces[0], names)
    ones, alls, b_ones, b_alls = [], [], [], []
    for _ in range(args.repeats):  # interleaved with the baseline, so both see the same load
        ones.append(_run(one, tmp / "one-run", spill_csv))
        if BASELINE:
            b_ones.append(_run(one, tmp / "one-run", spill_csv, baseline=True))
    for _ in range(max(1, args.repeats // 2)):
        alls.append(_run(cohort, tmp / "small-run", spill_csv))
        if BASELINE:
            b_alls.append(_run(cohort, tmp / "small-base", spill_csv, baseline=True))
    t_one, t_all = statistics.median(ones), statistics.median(alls)
    rois = sorted(cohort.glob("*.ome.tiff"))
    f_one = statistics.median(floor_seconds([(rois[0], tmp / "floor-one.ome.tiff")])
                              for _ in range(args.repeats))
    f_all = floor_seconds([(r, tmp / f"floor-{r.name}") for r in rois])
    per = (t_all - t_one) / max(1, args.small - 1)
    floor_per = (f_all - f_one) / max(1, args.small - 1)
    print(f"\n[small] {args.small} ROIs of {args.channels} x 96 x 96")
    print(f"run of 1 ROI       median {t_one:6.2f} s  runs {_list(ones)}")
    print(f"run of {args.small} ROIs   median {t_all:6.2f} s  runs {_list(alls)}")
    print(f"floor (read + write): 1 ROI {f_one:.2f} s, {args.small} ROIs {f_all:.2f} s, "
          f"{floor_per:.4f} s per ROI")
    print(f"fixed cost per ROI = {per:.3f} s   (target <= 0.1 s, must be < 0.25 s)   "
          f"{per / max(floor_per, 1e-9):.0f}x the floor's per ROI; run of {args.small} / floor = "
          f"{t_all / f_all:.1f}x   {load()}")
    _stage_split(tmp / "small-run")
    if BASELINE:
        b_one, b_all = statistics.median(b_ones), statistics.median(b_alls)
        b_per = (b_all - b_one) / max(1, args.small - 1)
        print(f"baseline: 1 ROI {b_one:.2f} s (runs {_list(b_ones)}), {args.small} ROIs {b_all:.2f} s "
              f"(runs {_list(b_alls)}), fixed cost per ROI = {b_per:.3f} s; this checkout / baseline = "
              f"{per / max(b_per, 1e-9):.2f}x   {load()}")
        _stage_split(tmp / "small-base")


RESUME_FLOOR = """
import os, sys
for folder in sys.argv[1:]:
    for entry in os.scandir(folder):
        entry.stat()
open(os.path.join(sys.argv[2], "ledger.jsonl"), "rb").read()
"""


def _resume_part(tmp: Path, counts, names, spill_csv: Path, args) -> None:
    """A rerun of a finished cohort, against a process that stats both folders and reads the ledger."""
    import subprocess
    import sys
    import time

    cohort = tmp / "resume"
    for k, piece in enumerate(_tiles(counts, 96, args.resume_rois)):
        write_roi(cohort / f"roi_{k:04d}.ome.tiff", piece, names)
    out = tmp / "resume-run"
    _run(cohort, out, spill_csv)

    def floor():
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", RESUME_FLOOR, str(cohort), str(out)], check=True)
        return time.perf_counter() - start

    t_floor, floors = _median(floor, args.repeats)
    t_resume, resumes = _median(lambda: _run(cohort, out, spill_csv, fresh=False), args.repeats)
    t_verify, verifies = _median(lambda: _run(cohort, out, spill_csv, "--verify", fresh=False),
                                 args.repeats)
    print(f"\n[resume] rerun of a finished cohort of {args.resume_rois} ROIs")
    print(f"floor (python start-up, stat both folders, read the ledger)  median {t_floor:6.2f} s  "
          f"runs {_list(floors)}")
    print(f"resume (size + time)  median {t_resume:6.2f} s  runs {_list(resumes)}"
          f"   (target <= 1.5 s, must be < 2.5 s)   resume / floor = {t_resume / t_floor:.1f}x")
    print(f"resume --verify       median {t_verify:6.2f} s  runs {_list(verifies)}   {load()}")
    if BASELINE:
        base_out = tmp / "resume-base"
        _run(cohort, base_out, spill_csv, baseline=True)
        t_base, bases = _median(lambda: _run(cohort, base_out, spill_csv, fresh=False, baseline=True),
                                args.repeats)
        print(f"baseline resume       median {t_base:6.2f} s  runs {_list(bases)}   "
              f"this checkout / baseline = {t_resume / t_base:.2f}x   {load()}")


def _stage_split(run: Path) -> None:
    """Median seconds per ROI of each stage the ledger records (quality: raw + washed)."""
    import json

    records = [json.loads(line) for line in (run / "ledger.jsonl").read_text().splitlines() if line]
    records = [r for r in records if r.get("status") == "done" and r.get("timings")]
    if not records:
        return
    stages = {k: statistics.median(r["timings"].get(k, 0.0) for r in records) for k in records[0]["timings"]}
    total = statistics.median(r["seconds"] for r in records)
    print("  per ROI (median, from the ledger): " + ", ".join(f"{k} {v:.3f} s" for k, v in stages.items())
          + f"; whole task {total:.3f} s, quality share {stages.get('quality', 0.0) / max(total, 1e-9):.0%}")


def _list(values) -> str:
    return ", ".join(f"{v:.2f}" for v in values)


if __name__ == "__main__":
    main()
