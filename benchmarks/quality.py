"""Benchmark of the quality measurement of one ROI (``measure_stack``).

Run: ``python benchmarks/quality.py [--size 1000] [--repeats 3]``

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
import os
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--seed", type=int, default=2026)
    args = parser.parse_args()

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
