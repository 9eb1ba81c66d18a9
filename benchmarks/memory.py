"""Peak memory of washing one big stack through the run path, against the stack's size.

Builds a 50 x 2000 x 2000 float32 stack on disk (800 MB as pixels; the demo generator
simulates a 1000 x 1000 field that is tiled 2 x 2, so the content is realistic tissue),
then runs ``run_cohort`` on it in a fresh child process (read lazily, hot pixels, NNLS
compensation, speckle, write OME-TIFF, hashes, quality of raw and washed, report) and
prints the child's peak resident memory divided by the stack's bytes. Target <= 0.5,
must be < 0.6.

The peak is the one the child reports of itself: ``VmHWM`` of ``/proc/self/status``,
read as it exits (Linux). (``getrusage(RUSAGE_CHILDREN)`` is not used: a child started
by ``fork`` inherits the parent's peak, and the parent built the stack in memory.) The
parent also polls the child's ``VmRSS`` every 50 ms as a cross-check (a lower bound).

``--breakdown`` runs the same parts one at a time in the child and prints the peak of
each (Linux: the peak is reset between parts by writing 5 to /proc/self/clear_refs), to
see which part holds the memory.

    python benchmarks/memory.py [--channels 50] [--size 2000] [--breakdown]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

from _common import load_generator
from _dense import load

ROOT = Path(__file__).resolve().parents[1]

_RUN_CHILD = textwrap.dedent("""
    import json, sys

    def own_peak_mb():
        for line in open("/proc/self/status"):
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
        return float("nan")

    from plexwash.qc.run import run_cohort
    try:
        summary = run_cohort(sys.argv[1], sys.argv[2], spillover=sys.argv[3], progress=False)
    finally:
        print(json.dumps({"own_peak_mb": own_peak_mb()}), flush=True)
    sys.exit(summary.exit_code)
""")

_BREAKDOWN_CHILD = textwrap.dedent("""
    import json, sys, time
    from pathlib import Path

    def peak_mb():
        for line in open("/proc/self/status"):
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
        return float("nan")

    def reset():
        try:
            with open("/proc/self/clear_refs", "w") as fh:
                fh.write("5")
        except OSError:
            pass

    def rss_mb():
        for line in open("/proc/self/status"):
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
        return float("nan")

    parts = []
    def part(name, t0):
        release_memory()  # as the run does between the parts of an ROI
        parts.append({"part": name, "peak_mb": peak_mb(), "after_mb": rss_mb(),
                      "seconds": time.perf_counter() - t0})
        reset()

    roi_path, out, spill = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3]
    out.mkdir(parents=True, exist_ok=True)
    t = time.perf_counter()
    import numpy, dask.array, scipy.ndimage, skimage.filters, tifffile, zarr, numba  # noqa
    from plexwash.qc import io, spillover
    from plexwash.qc.recipe import default_recipe
    from plexwash.qc.report import downsample
    from plexwash.qc.run import bound_heap, measure_quality, release_memory
    from plexwash.qc.wash import wash_to_file
    bound_heap()  # as the run does
    part("imports", t)
    t = time.perf_counter()
    recipe = default_recipe()
    roi = io.read_roi(roi_path)
    matrix = spillover.read_spillover(spill)
    part("read_roi (lazy)", t)
    t = time.perf_counter()
    io.sha256_path(roi_path)
    part("hash input", t)
    t = time.perf_counter()
    target = out / "big.ome.tiff"
    wash_to_file(roi, target, recipe, spillover=matrix)
    part("wash_to_file", t)
    t = time.perf_counter()
    measure_quality(roi, target, recipe, matrix, threads=2)
    part("quality raw + washed", t)
    t = time.perf_counter()
    downsample(io.read_roi(target).data)
    downsample(roi.data)
    part("report thumbnails", t)
    print(json.dumps(parts))
""")


def build_stack(folder: Path, *, channels: int, size: int) -> tuple[Path, Path, int]:
    """Write the big ROI (a simulated half-size field tiled 2 x 2) and its spillover CSV."""
    import numpy as np

    sys.path.insert(0, str(ROOT / "benchmarks"))
    from _dense import channel_names  # the same mass-tagged names as the speed benchmarks
    from plexwash.qc.io import write_ome_tiff

    gen = load_generator()
    names = channel_names(channels)
    stains = gen.random_stains(names, np.random.default_rng(50), failed=names[5], dim=names[3],
                             rare=names[7], specks=names[9])
    spill = gen.build_spillover(names, np.random.default_rng(51))
    half = size // 2
    counts, _ = gen.simulate_roi(np.random.default_rng(52), stains, spill, half, dtype=np.float32,
                                 n_striped_rows=2)
    stack = np.tile(counts, (1, 2, 2))
    del counts
    cohort = folder / "cohort"
    cohort.mkdir(parents=True)
    roi = cohort / "big.ome.tiff"
    write_ome_tiff(roi, stack, names, pixel_size=(1.0, 1.0))
    nbytes = stack.nbytes
    del stack
    spill_csv = folder / "spillover.csv"
    gen.write_spillover_csv(spill_csv, spill, names)
    return roi, spill_csv, nbytes


def _rss_of(pid: int) -> float:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return 0.0


def run_child(code: str, args: list[str]) -> tuple[int, list, str]:
    """Run a child, poll its RSS, return (exit code, RSS timeline, stdout)."""
    env = {**os.environ, "OMP_WAIT_POLICY": "PASSIVE"}
    start = time.perf_counter()
    child = subprocess.Popen([sys.executable, "-c", code, *args], env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    timeline = []
    while child.poll() is None:
        timeline.append((time.perf_counter() - start, _rss_of(child.pid)))
        time.sleep(0.05)
    out, err = child.communicate()
    if child.returncode:
        print(err[-3000:], file=sys.stderr)
    return child.returncode, timeline, out


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=50)
    parser.add_argument("--size", type=int, default=2000)
    parser.add_argument("--breakdown", action="store_true",
                        help="also measure the peak of each part separately")
    parser.add_argument("--keep", type=Path, help="build (or reuse) the stack in this folder")
    args = parser.parse_args(argv)

    folder = args.keep or Path(tempfile.mkdtemp(prefix="plexwash-memory-"))
    try:
        roi = folder / "cohort" / "big.ome.tiff"
        spill_csv = folder / "spillover.csv"
        t0 = time.perf_counter()
        if not roi.exists():
            roi, spill_csv, _ = build_stack(folder, channels=args.channels, size=args.size)
        nbytes = args.channels * args.size * args.size * 4
        print(f"stack {args.channels} x {args.size} x {args.size} float32 = {nbytes / 2**20:.0f} MiB "
              f"({roi.stat().st_size / 2**20:.0f} MiB on disk), ready in {time.perf_counter() - t0:.0f} s; "
              f"{load()}")
        out = folder / "run"
        shutil.rmtree(out, ignore_errors=True)
        t0 = time.perf_counter()
        code, timeline, text = run_child(_RUN_CHILD, [str(roi.parent), str(out), str(spill_csv)])
        peak = json.loads(text.strip().splitlines()[-1])["own_peak_mb"]
        seconds = time.perf_counter() - t0
        ledger = [json.loads(line) for line in (out / "ledger.jsonl").read_text().splitlines()] \
            if (out / "ledger.jsonl").exists() else []
        timings = ledger[-1].get("timings", {}) if ledger else {}
        print(f"run_cohort child: exit {code}, {seconds:.0f} s; parts: "
              + ", ".join(f"{k} {v:.1f} s" for k, v in timings.items()))
        polled = max((r for _, r in timeline), default=0.0)
        print(f"child's own peak RSS (VmHWM at exit) {peak:.0f} MiB (polled VmRSS max "
              f"{polled:.0f} MiB); peak RSS / stack bytes = {peak * 2**20 / nbytes:.3f}   "
              f"(target <= 0.5, must be < 0.6)")
        if args.breakdown:
            code, _, text = run_child(_BREAKDOWN_CHILD, [str(roi), str(folder / "parts"),
                                                            str(spill_csv)])
            parts = json.loads(text.strip().splitlines()[-1]) if code == 0 else []
            print("part                      peak MiB   RSS after   seconds   peak / stack")
            for p in parts:
                print(f"{p['part']:<25} {p['peak_mb']:>8.0f}   {p['after_mb']:>9.0f}   "
                      f"{p['seconds']:>7.1f}   {p['peak_mb'] * 2**20 / nbytes:>10.3f}")
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
