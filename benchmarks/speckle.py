"""Benchmark of the hot-pixel and speckle steps on one 40 x 1000 x 1000 float32 ROI.

Run: ``python benchmarks/speckle.py [--channels 40] [--size 1000] [--repeats 5] [--threads N]``

Prints medians of several repeats and ratios to floors measured in the same run:
8 shifted ``np.maximum`` (the hot-pixel rule's cheapest form) and a positive-neighbour
count by ``scipy.ndimage.uniform_filter`` (the density test's cheapest form), plus the
ratio of speckle time at radius 6 to radius 2 (the window cost should not grow).

Floors and steps run under the same thread count, ``--threads`` (default: all cores,
``os.cpu_count()``): the steps run channels on a pool of ``os.cpu_count()`` threads, so
the benchmark sets that to ``--threads``, and the floors run their channels on a pool of
the same size (numpy and scipy.ndimage release the GIL on whole planes).

Wash steps per ROI: ``python benchmarks/speckle.py --steps [--baseline DIR] [--small 10]
[--repeats 3]`` times, as a wash calls them (one channel per call, one thread), the ROI's
background context (``roi_background``), hot pixels and speckle (with what compensation
removed, so the residue test runs) on small 36 x 96 x 96 ROIs and on one dense 36 x 1008 x
1008 ROI (``_dense.py``), in a child process of this checkout and, with ``--baseline``, one
whose ``plexwash`` comes from ``DIR`` (e.g. main archived there), on the same pixels in the
same run, repeats interleaved. Prints seconds per ROI (median; CPU seconds beside), the
ratios and the load average.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from plexwash.qc.steps.hot_pixels import HotPixelSettings, hot_pixels_stack  # noqa: E402
from plexwash.qc.steps.speckle import SpeckleSettings, speckle_stack  # noqa: E402
from scipy import ndimage as ndi  # noqa: E402


def make_stack(n_channels: int, size: int, seed: int = 0) -> np.ndarray:
    """Counts like a tissue ROI: cells (disks) in some channels, sparse background, hot pixels."""
    rng = np.random.default_rng(seed)
    centres = np.ones((size, size), bool)
    centres[rng.integers(0, size, size * 4), rng.integers(0, size, size * 4)] = False
    distance = ndi.distance_transform_edt(centres)
    cells = np.where(distance < 5, rng.integers(1, 8, (size, size)), 0)  # cell label 1..7
    stack = np.empty((n_channels, size, size), np.float32)
    for c in range(n_channels):
        expect = np.where(cells == 1 + c % 7, rng.uniform(2, 20), 0.0) + rng.uniform(0.02, 0.3)
        stack[c] = rng.poisson(expect)
        hot = rng.integers(0, size * size, 50)
        stack[c].flat[hot] += rng.uniform(200, 1000, 50).astype(np.float32)
    return stack


def shifted_maximum(stack: np.ndarray) -> np.ndarray:
    """Max of the 8 neighbours by 8 shifted ``np.maximum`` (edges mirrored)."""
    padded = np.pad(stack, ((0, 0), (1, 1), (1, 1)), mode="reflect")
    _, h, w = stack.shape
    out = np.full(stack.shape, -np.inf, np.float32)
    for dy in (0, 1, 2):
        for dx in (0, 1, 2):
            if dy != 1 or dx != 1:
                np.maximum(out, padded[:, dy : dy + h, dx : dx + w], out=out)
    return out


def uniform_count(stack: np.ndarray, radius: int) -> np.ndarray:
    """Positive-pixel count in each (2r+1)^2 window by ``uniform_filter``."""
    side = 2 * radius + 1
    return ndi.uniform_filter((stack > 0).astype(np.float32), size=(1, side, side), mode="constant") * side**2


def per_channel(func, stack: np.ndarray, threads: int) -> None:
    """``func`` on each channel of ``stack``, channels on a pool of ``threads`` threads."""
    with ThreadPoolExecutor(max_workers=threads) as pool:
        list(pool.map(lambda c: func(stack[c : c + 1]), range(stack.shape[0])))


def timings(funcs: dict, repeats: int) -> dict:
    """(median, best) wall time of each function; repeats are interleaved so load changes hit all alike."""
    times = {name: [] for name in funcs}
    for _ in range(repeats):
        for name, func in funcs.items():
            start = time.perf_counter()
            func()
            times[name].append(time.perf_counter() - start)
    return {name: (statistics.median(t), min(t)) for name, t in times.items()}


STEP_NAMES = ("context", "hot_pixels", "speckle")


def step_seconds(folder: Path, small: int) -> dict:
    """Seconds (wall, CPU) per ROI of each wash step on the ROIs saved in ``folder``, one thread,
    one channel per call as the wash makes them (run in a child process: see ``--steps``)."""
    from plexwash.qc.background_context import roi_background
    from plexwash.qc.steps.registry import step

    os.cpu_count = lambda: 1
    raw, compensated, spilled = (np.load(folder / f"{name}.npy") for name in ("raw", "compensated", "spilled"))
    edge = 96
    starts = [(y, x) for y in range(0, raw.shape[1] - edge + 1, edge) for x in range(0, raw.shape[2] - edge + 1, edge)]
    rois = {"small": [tuple(np.ascontiguousarray(a[:, y:y + edge, x:x + edge]) for a in (raw, compensated, spilled))
                      for y, x in starts[:small + 1]],
            "dense": [(raw, compensated, spilled)]}
    hot, speckle = step("hot_pixels"), step("speckle")
    hot_settings, speckle_settings = hot.settings(), speckle.settings()

    def run(roi) -> dict:
        raw_roi, comp_roi, spilled_roi = roi
        seconds = {}
        clock = (time.perf_counter(), time.process_time())
        context = roi_background(raw_roi.__getitem__, range(raw_roi.shape[0]), raw_roi.shape[1:])
        seconds["context"], clock = _lap(clock)
        for c in range(raw_roi.shape[0]):
            hot.run(raw_roi[c:c + 1], [hot_settings], None, parallel=False)
        seconds["hot_pixels"], clock = _lap(clock)
        for c in range(raw_roi.shape[0]):
            speckle.run(comp_roi[c:c + 1], [speckle_settings], None, parallel=False, background=context,
                        spilled=spilled_roi[c:c + 1])
        seconds["speckle"], clock = _lap(clock)
        return seconds

    run(rois["small"][0])  # first calls compile or load the numba caches; not timed
    out = {}
    for kind, batch in (("small", rois["small"][1:]), ("dense", rois["dense"])):
        laps = [run(roi) for roi in batch]
        out[kind] = {name: [float(np.sum([lap[name][k] for lap in laps]) / len(laps)) for k in (0, 1)]
                     for name in STEP_NAMES}
    return out


def _lap(clock):
    now = (time.perf_counter(), time.process_time())
    return (now[0] - clock[0], now[1] - clock[1]), now


def steps_main(args) -> None:
    """Both checkouts' step seconds per ROI, children interleaved, medians of ``--repeats``."""
    import json
    import subprocess
    import sys
    import tempfile

    from _dense import dense_counts
    from plexwash.qc.steps.compensation import compensation_stack
    from plexwash.qc.steps.registry import step

    counts, _, spill = dense_counts(36, 1008)
    compensated = compensation_stack(counts, [step("compensation").settings()] * 36, spill).image
    compensated = np.ascontiguousarray(compensated, np.float32)
    here = Path(__file__).resolve()
    sides = {"this checkout": None}
    if args.baseline:
        sides["baseline"] = str(Path(args.baseline).resolve())
    results = {side: [] for side in sides}
    with tempfile.TemporaryDirectory() as folder:
        np.save(Path(folder) / "raw.npy", counts)
        np.save(Path(folder) / "compensated.npy", compensated)
        np.save(Path(folder) / "spilled.npy", counts - compensated)
        del counts, compensated
        for _ in range(args.repeats):
            for side, path in sides.items():
                env = dict(os.environ)
                if path is not None:
                    env["PYTHONPATH"] = path + os.pathsep + env.get("PYTHONPATH", "")
                child = subprocess.run([sys.executable, str(here), "--steps-child", folder, "--small", str(args.small)],
                                       env=env, capture_output=True, text=True, check=True)
                results[side].append(json.loads(child.stdout.strip().splitlines()[-1]))
    load = os.getloadavg()
    print(f"wash steps per ROI, one thread, one channel per call; {args.repeats} interleaved repeats (median); "
          f"small: {args.small} ROIs of 36 x 96 x 96, dense: 1 ROI of 36 x 1008 x 1008; "
          f"load average {load[0]:.1f} {load[1]:.1f} {load[2]:.1f}")
    for kind in ("small", "dense"):
        print(f"-- {kind}: wall s per ROI (CPU s)")
        totals = {}
        for name in (*STEP_NAMES, "all"):
            cells = []
            for side in sides:
                if name == "all":
                    wall = statistics.median(sum(r[kind][n][0] for n in STEP_NAMES) for r in results[side])
                    cpu = statistics.median(sum(r[kind][n][1] for n in STEP_NAMES) for r in results[side])
                else:
                    wall = statistics.median(r[kind][name][0] for r in results[side])
                    cpu = statistics.median(r[kind][name][1] for r in results[side])
                totals[side] = wall
                cells.append(f"{side} {wall:8.4f} ({cpu:7.4f})")
            ratio = f"   baseline / this = {totals['baseline'] / max(totals['this checkout'], 1e-12):5.2f}x" \
                if "baseline" in totals else ""
            print(f"{name:<11} " + "   ".join(cells) + ratio)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", action="store_true", help="the wash steps' seconds per small and dense ROI")
    parser.add_argument("--steps-child", help=argparse.SUPPRESS)
    parser.add_argument("--baseline", help="with --steps: a folder holding another plexwash package to time too")
    parser.add_argument("--small", type=int, default=10, help="with --steps: small ROIs timed")
    parser.add_argument("--channels", type=int, default=40)
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1,
                        help="threads for the floors and the steps alike (default: all cores)")
    args = parser.parse_args()
    if args.steps_child:
        import json

        print(json.dumps(step_seconds(Path(args.steps_child), args.small)))
        return
    if args.steps:
        steps_main(args)
        return
    threads = args.threads
    os.cpu_count = lambda: threads  # the steps' channel pool takes os.cpu_count() threads

    stack = make_stack(args.channels, args.size)
    hot_settings = HotPixelSettings()
    r2, r6 = SpeckleSettings(radius=2), SpeckleSettings(radius=6)
    washed = hot_pixels_stack(stack, hot_settings).image
    # first calls compile or load the numba cache; not timed
    hot_pixels_stack(stack[:1], hot_settings)
    speckle_stack(washed[:1], r2)

    t = timings(
        {
            "max": lambda: per_channel(shifted_maximum, stack, threads),
            "box": lambda: per_channel(lambda s: uniform_count(s, 2), stack, threads),
            "hot": lambda: hot_pixels_stack(stack, hot_settings),
            "r2": lambda: speckle_stack(washed, r2),
            "r6": lambda: speckle_stack(washed, r6),
        },
        args.repeats,
    )
    load = os.getloadavg()[0]
    shape = "x".join(map(str, stack.shape))
    print(f"stack {shape} float32; floors and steps both on {threads} thread(s) "
          f"(channels in parallel); {args.repeats} interleaved repeats, load average {load:.1f}")
    for column, pick in (("median", 0), ("best", 1)):
        t_max, t_box, t_hot, t_r2, t_r6 = (t[k][pick] for k in ("max", "box", "hot", "r2", "r6"))
        print(f"-- {column}")
        print(f"floor: 8 shifted np.maximum           {t_max:7.3f} s")
        print(f"floor: uniform_filter count (5x5)     {t_box:7.3f} s")
        print(f"hot_pixels_stack                      {t_hot:7.3f} s   = {t_hot / t_max:5.2f}x shifted maximum")
        print(f"speckle_stack radius 2                {t_r2:7.3f} s   = {t_r2 / t_box:5.2f}x uniform_filter count")
        print(f"speckle_stack radius 6                {t_r6:7.3f} s   radius 6 / radius 2 = {t_r6 / t_r2:4.2f}")
        print(f"both steps (radius 2)                 {t_hot + t_r2:7.3f} s   target <= 1 s")


if __name__ == "__main__":
    main()
