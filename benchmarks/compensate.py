"""Benchmark of spillover compensation on one 40 x 1000 x 1000 float32 ROI.

Run: ``python benchmarks/compensate.py [--channels 40] [--size 1000] [--repeats 5]``

The stack is count data like a tissue ROI (bright cells in some channels, about one
background count per pixel, Poisson noise), spilled by a physics-like sparse matrix
(M +/- 1 neighbours, same-element isotopes and M + 16 oxides among mass-tagged channel
names). Prints medians of several repeats, all measured in the same run:

- ``compensate`` (exact NNLS) and ``compensate(method="linear")``;
- the dense unconstrained solve, the floor: ``inv(S^T) @ Y`` in float32 (one GEMM),
  and the same in float64 over 64k-pixel tiles with float32 output (the precision the
  exact solver works in);
- ``scipy.optimize.nnls`` per pixel, timed on a sample and extrapolated;

and the ratios: compensate / each floor, linear / each floor, scipy / compensate. It
also checks on the sample that the NNLS objective is never worse than scipy's.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from _common import median_time
from _dense import load
from plexwash.qc.spillover import compensate, plausible_pairs  # noqa: E402
from scipy.optimize import nnls  # noqa: E402

MASSES = ["Y89", "In113", "In115", "La139", "Pr141", "Nd142", "Nd143", "Nd144", "Nd145", "Nd146",
          "Sm147", "Nd148", "Sm149", "Nd150", "Eu151", "Sm152", "Eu153", "Sm154", "Gd155", "Gd156",
          "Gd158", "Tb159", "Gd160", "Dy161", "Dy162", "Dy163", "Dy164", "Ho165", "Er166", "Er167",
          "Er168", "Tm169", "Er170", "Yb171", "Yb172", "Yb173", "Yb174", "Lu175", "Yb176", "Ir191",
          "Ir193", "Pt195", "Pt196", "Bi209"]


def physics_matrix(channels, rng) -> np.ndarray:
    """Neighbours 0.3-0.8 %, isotopes 1-4 %, oxides 1-3 % (common practice, from memory)."""
    pairs = plausible_pairs(channels)
    s = np.eye(len(channels))
    masses = [int("".join(ch for ch in c if ch.isdigit())) for c in channels]
    elements = ["".join(ch for ch in c if ch.isalpha()) for c in channels]
    for i, j in zip(*np.nonzero(pairs), strict=True):
        if elements[i] == elements[j]:
            s[i, j] = rng.uniform(0.01, 0.04) if abs(masses[i] - masses[j]) <= 2 else 0.0
        elif masses[j] - masses[i] == 16:
            s[i, j] = rng.uniform(0.01, 0.03)
        else:
            s[i, j] = rng.uniform(0.003, 0.008)
    return s


def count_stack(s: np.ndarray, size: int, rng) -> np.ndarray:
    """Cells (disks of ~5 px) expressing random channels; ~1 count/pixel background."""
    from scipy import ndimage as ndi

    n = s.shape[0]
    seeds = np.ones((size, size), bool)
    n_cells = size * size // 120
    seeds[rng.integers(0, size, n_cells), rng.integers(0, size, n_cells)] = False
    distance, (iy, ix) = ndi.distance_transform_edt(seeds, return_indices=True)
    label = iy * size + ix
    inside = distance < 5
    stack = np.empty((n, size, size), np.float32)
    x = np.empty((n, size, size), np.float32)
    for c in range(n):
        positive = rng.random(size * size) < 0.2
        level = rng.uniform(10, 150)
        x[c] = rng.uniform(0.2, 1.5) + np.where(inside & positive[label], level, 0.0)
    for j in range(n):
        mean = np.tensordot(s[:, j], x, axes=(0, 0))
        stack[j] = rng.poisson(mean)
    return stack


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=40)
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--sample", type=int, default=2000, help="pixels timed with scipy")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    channels = MASSES[: args.channels]
    s = physics_matrix(channels, rng)
    stack = count_stack(s, args.size, rng)
    flat = stack.reshape(len(channels), -1)
    n_pixels = flat.shape[1]
    inverse_t = np.linalg.inv(s.T)
    inverse_t32 = inverse_t.astype(np.float32)

    def floor32():
        return inverse_t32 @ flat

    def floor64():
        out = np.empty(flat.shape, np.float32)
        for start in range(0, n_pixels, 65536):
            out[:, start : start + 65536] = inverse_t @ flat[:, start : start + 65536].astype(np.float64)
        return out

    compensate(stack[:, :8, :8], s)  # compile / load the numba cache outside the timing
    compensate(stack[:, :8, :8], s, method="linear")
    t_nnls = median_time(lambda: compensate(stack, s), args.repeats)
    t_linear = median_time(lambda: compensate(stack, s, method="linear"), args.repeats)
    t_floor32 = median_time(floor32, args.repeats)
    t_floor64 = median_time(floor64, args.repeats)

    out = compensate(stack, s).reshape(len(channels), -1)
    sample = rng.choice(n_pixels, size=min(args.sample, n_pixels), replace=False)
    a = s.T
    start = time.perf_counter()
    references = [nnls(a, flat[:, p].astype(np.float64)) for p in sample]
    t_scipy = (time.perf_counter() - start) / sample.size * n_pixels
    worse = 0
    for p, (_, residual) in zip(sample, references, strict=True):
        y = flat[:, p].astype(np.float64)
        ours = float(np.sum((a @ out[:, p].astype(np.float64) - y) ** 2))
        worse += ours > residual**2 * (1 + 1e-6) + 1e-12 * float(y @ y)
    negative = float(np.mean((floor64() < 0).any(axis=0)))

    print(f"stack {len(channels)} x {args.size} x {args.size} float32, {int((s > 0).sum()) - len(s)} "
          f"non-zero spillover entries; {100 * negative:.1f} % of pixels have a negative "
          f"component after the unconstrained solve")
    print(f"medians of {args.repeats} repeats (s):")
    print(f"  compensate nnls                      {t_nnls:8.3f}")
    print(f"  compensate linear                    {t_linear:8.3f}")
    print(f"  floor: inv(S^T) @ Y float32          {t_floor32:8.3f}")
    print(f"  floor: float64, 64k tiles            {t_floor64:8.3f}")
    print(f"  scipy.optimize.nnls per pixel (extr.) {t_scipy:7.1f}")
    print("ratios:")
    print(f"  compensate / dense solve float32     {t_nnls / t_floor32:6.2f}x")
    print(f"  compensate / dense solve float64     {t_nnls / t_floor64:6.2f}x")
    print(f"  linear / dense solve float32         {t_linear / t_floor32:6.2f}x")
    print(f"  linear / dense solve float64         {t_linear / t_floor64:6.2f}x")
    print(f"  scipy per pixel / compensate         {t_scipy / t_nnls:6.0f}x")
    print(f"objective worse than scipy (1e-6 rel) on {worse} of {sample.size} sampled pixels")
    print(load())
    return 0 if worse == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
