"""Benchmark of the quality measurement of one ROI (``measure_stack``).

Run: ``python benchmarks/quality.py [--size 1000] [--repeats 3]``

``--per-roi`` instead times quality as a run pays it per ROI (``run.execute.measure_quality``:
the raw stage with the true spillover matrix, then the washed stage judged against it) on
dense counts (``_dense.py``): one 36 x 1008 x 1008 ROI and ``--small`` ROIs of 36 x 96 x 96
cut from it, each washed once beforehand. With ``--baseline DIR`` (DIR holding another
checkout as ``plexwash/qc``, see ``run_cohort.py``) the other checkout is timed in the same
run, interleaved, each in a process of its own (numba kernels compiled beforehand), and the
ratios printed with the load average:

    python benchmarks/quality.py --per-roi [--small 20] [--repeats 3] [--baseline DIR]

The ROI comes from the demo generator (``example_stack/generate.py``, default
22-channel stains with a failed stain, a dim stain, stripes and hot pixels), so the
ghost fits do the work they do on real-looking data. Prints medians of several
repeats and ratios to floors measured in the same run:

- one pass of the cheapest per-channel work the measurement cannot avoid
  (float64 copy, ``log1p``, a Gaussian smoothing and Otsu's threshold on each
  channel: the split alone);
- the stack's bytes read through once (``np.asarray(stack[c]).sum()`` per channel);

and the peak memory traced during ``measure_stack`` relative to one channel in
float64 (memory should be bounded by a channel, not by the stack). It also checks
the verdicts against the generator's truth.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import tracemalloc
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from _common import load_generator, median_time
from plexwash.qc.quality import measure_stack  # noqa: E402
from scipy import ndimage  # noqa: E402
from skimage.filters import threshold_otsu  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def _split_only(stack):
    for c in range(stack.shape[0]):
        smoothed = ndimage.gaussian_filter(np.log1p(stack[c].astype(np.float64)), 1.0)
        threshold_otsu(smoothed)


def _read_once(stack):
    for c in range(stack.shape[0]):
        np.asarray(stack[c]).sum()


#: One process timing measure_quality on the prepared ROIs: argv = folder, names of ROIs.
PER_ROI_CHILD = """
import json, sys, time
from pathlib import Path
import numpy as np
from plexwash.qc.io.roi import Roi
from plexwash.qc.recipe import default_recipe
from plexwash.qc.run.execute import measure_quality
from plexwash.qc.spillover import SpilloverMatrix
folder = Path(sys.argv[1])
names = tuple(json.loads((folder / "names.json").read_text()))
matrix = SpilloverMatrix(names, np.load(folder / "spillover.npy"))
recipe = default_recipe()
out = {}
for group in sys.argv[2:]:
    times = []
    for k, raw in enumerate(sorted(folder.glob(group + "_*.raw.npy"))):
        roi = Roi(data=np.load(raw), channels=names, path=raw)
        washed = np.load(str(raw).replace(".raw.npy", ".washed.npy"))
        if k == 0:  # the first ROI of a group once more, untimed: kernels compiled, caches warm
            measure_quality(roi, washed, recipe, matrix, threads=1)
        start = time.perf_counter()
        measure_quality(roi, washed, recipe, matrix, threads=1)
        times.append(time.perf_counter() - start)
    out[group] = sum(times) / len(times)
print(json.dumps(out))
"""


def _prepare_per_roi(folder: Path, n_small: int) -> None:
    """The dense ROI, ``n_small`` 96^2 ROIs cut from it, each washed (this checkout's wash)."""
    from _dense import dense_counts
    from plexwash.qc.io.roi import Roi
    from plexwash.qc.recipe import default_recipe
    from plexwash.qc.spillover import SpilloverMatrix
    from plexwash.qc.wash import wash

    counts, names, spill = dense_counts(36, 1008)
    matrix = SpilloverMatrix(tuple(names), spill)
    (folder / "names.json").write_text(json.dumps(names))
    np.save(folder / "spillover.npy", spill)
    recipe = default_recipe()
    tiles = [counts[:, y:y + 96, x:x + 96] for y in range(0, 1008 - 95, 96)
             for x in range(0, 1008 - 95, 96)][:n_small]
    for group, stacks in (("dense", [counts]), ("small", tiles)):
        for k, raw in enumerate(stacks):
            raw = np.ascontiguousarray(raw)
            washed = wash(Roi(data=raw, channels=tuple(names), path=folder / "none.ome.tiff"),
                          recipe, spillover=matrix)
            np.save(folder / f"{group}_{k:03d}.raw.npy", raw)
            np.save(folder / f"{group}_{k:03d}.washed.npy", np.asarray(washed.data))


def _per_roi_child(folder: Path, env=None) -> dict:
    done = subprocess.run([sys.executable, "-c", PER_ROI_CHILD, str(folder), "dense", "small"],
                          capture_output=True, text=True,
                          env=dict(os.environ, OMP_WAIT_POLICY="PASSIVE", **(env or {})))
    if done.returncode != 0:
        raise SystemExit(f"timing process failed:\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def per_roi(args) -> None:
    """Quality seconds per ROI, dense and small, this checkout against ``--baseline``."""
    from _dense import load

    baseline = None if args.baseline is None else {"PYTHONPATH": str(args.baseline.resolve())}
    with tempfile.TemporaryDirectory(prefix="plexwash-quality-") as tmp:
        folder = Path(tmp)
        _prepare_per_roi(folder, args.small)
        print(f"prepared: one dense 36 x 1008^2 ROI and {args.small} ROIs of 36 x 96^2, washed; "
              f"{load()}")
        ours, theirs = [], []
        for _ in range(args.repeats):
            ours.append(_per_roi_child(folder))
            if baseline is not None:
                theirs.append(_per_roi_child(folder, baseline))
        print(f"quality seconds per ROI (raw + washed, one thread; medians of {args.repeats} "
              f"processes)   {load()}")
        for group, label in (("dense", "dense 36 x 1008^2"), ("small", "small 36 x 96^2")):
            mine = statistics.median(r[group] for r in ours)
            line = f"  {label:18s} this checkout {mine:8.3f} s"
            if theirs:
                base = statistics.median(r[group] for r in theirs)
                line += f"   baseline {base:8.3f} s   this / baseline = {mine / base:.2f}x"
            print(line)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--per-roi", action="store_true",
                        help="quality seconds per dense and small ROI (see the notes)")
    parser.add_argument("--small", type=int, default=20, help="small ROIs for --per-roi (<= 100)")
    parser.add_argument("--baseline", type=Path,
                        help="--per-roi: folder holding another checkout as plexwash/qc")
    args = parser.parse_args()
    if args.per_roi:
        per_roi(args)
        return

    gen = load_generator()
    stains = gen.default_stains()
    names = [m.channel for m in stains]
    spill = gen.build_spillover(names, np.random.default_rng([args.seed, 0]))
    stack, truth = gen.simulate_roi(np.random.default_rng(args.seed), stains, spill, args.size,
                                    n_striped_rows=3)
    print(f"ROI {stack.shape} {stack.dtype}, {stack.nbytes / 1e6:.0f} MB")

    result = measure_stack(stack, names)  # warm-up, and the verdicts
    wrong = [m.channel for m, cq in zip(stains, result.channels, strict=True)
             if cq.empty != (m.role == "failed")]
    print(f"empty verdicts wrong: {wrong or 'none'}; striped rows found {result.striped_rows}, "
          f"true {tuple(int(r) for r in truth['striped_rows'])}")

    t_measure = median_time(lambda: measure_stack(stack, names), args.repeats)
    cores = os.cpu_count() or 1
    t_threads = median_time(lambda: measure_stack(stack, names, threads=cores), args.repeats)
    t_split = median_time(lambda: _split_only(stack), args.repeats)
    t_read = median_time(lambda: _read_once(stack), args.repeats)

    tracemalloc.start()
    measure_stack(stack, names)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    channel_bytes = stack.shape[1] * stack.shape[2] * 8

    print(f"measure_stack               {t_measure:8.3f} s (median of {args.repeats})")
    print(f"measure_stack, {cores} threads     {t_threads:8.3f} s")
    print(f"split only (floor)          {t_split:8.3f} s")
    print(f"read once                   {t_read:8.3f} s")
    print(f"measure_stack / split only  = {t_measure / t_split:.1f}x")
    print(f"measure_stack / read once   = {t_measure / t_read:.1f}x")
    print(f"one thread / {cores} threads      = {t_measure / t_threads:.2f}x")
    print(f"peak traced memory / one float64 channel = {peak / channel_bytes:.1f}x "
          f"(stack is {stack.nbytes / channel_bytes:.1f}x)")


if __name__ == "__main__":
    main()
