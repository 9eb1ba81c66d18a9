"""How well the spillover estimators recover the true matrix of synthetic cohorts.

Run: ``python benchmarks/spillover_recovery.py [--unseen 2] [--skip-tissue]``

Cohorts: the committed demo (``example_stack``) and ``--unseen`` fresh cohorts from the
same generator with other random states (a different stains each), which the
estimators were not tuned on.

Controls (:func:`estimate_from_controls`), over the rows that have a control:
- median relative error of entries whose true value is >= 0.3 %  (target <= 10 %)
- largest absolute error of any entry                            (target <= 0.003)

Tissue (:func:`estimate_from_tissue`, all ROIs of the cohort pooled):
- relative error of the entries >= 1 % that the tissue can reveal (target <= 25 %): the
  source has a real stain (not failed, not dim) and, among the 4 x 4 pixel blocks (the
  estimator's resolution) where the source's true signal is above its median, at least
  10 % carry no true signal of the receiver
- false pairs: estimated non-zero where the truth is 0             (target <= 2)
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
# tests import this file by path: make its sibling _common importable either way
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
from _common import load_generator  # noqa: E402
from plexwash.qc.spillover import (  # noqa: E402
    estimate_from_controls,
    estimate_from_tissue,
    read_spillover,
)

ROOT = Path(__file__).resolve().parents[1]
#: Block edge of the tissue estimator (its default ``bin_size``).
BLOCK = 4
DEMO = ROOT / "example_stack"
#: Channel names of the unseen panels (other masses, other elements).
UNSEEN_PANELS = (
    ["Y89", "In113", "In115", "La139", "Pr141", "Nd142", "Nd143", "Nd144", "Nd145", "Nd146",
     "Sm147", "Nd148", "Sm149", "Nd150", "Eu151", "Sm152", "Eu153", "Sm154", "Gd155", "Gd156",
     "Gd158", "Tb159", "Gd160", "Dy161", "Dy162", "Dy163", "Dy164", "Ho165", "Er166", "Er167",
     "Er168", "Tm169", "Er170", "Yb171", "Yb172", "Yb173", "Yb174", "Lu175", "Yb176", "Ir191",
     "Ir193"],
    ["Pr141", "Nd143", "Nd144", "Nd145", "Nd146", "Sm147", "Nd148", "Sm149", "Nd150", "Eu151",
     "Sm152", "Eu153", "Sm154", "Gd155", "Gd156", "Gd158", "Tb159", "Gd160", "Dy161", "Dy162",
     "Dy163", "Dy164", "Ho165", "Er166", "Er167", "Er168", "Tm169", "Er170", "Yb171", "Yb172",
     "Yb173", "Yb174", "Lu175", "Yb176", "Ir191", "Ir193"],
)


def truth_matrix(folder: Path, channels) -> np.ndarray:
    truth = read_spillover(folder / "truth" / "spillover.csv")
    order = [truth.channels.index(c) for c in channels]
    return truth.values[np.ix_(order, order)]


def controls_metrics(folder: Path) -> dict:
    start = time.perf_counter()
    m = estimate_from_controls(folder / "controls" / "controls.csv")
    seconds = time.perf_counter() - start
    true = truth_matrix(folder, m.channels)
    info = json.loads((folder / "truth" / "truth.json").read_text())
    rows = np.array([c in info["estimable_sources"] for c in m.channels])
    off = ~np.eye(len(m.channels), dtype=bool) & rows[:, None]
    big = off & (true >= 0.003)
    rel = np.abs(m.values - true)[big] / true[big]
    covered = ((m.low <= true) & (true <= m.high))[off]
    return {
        "entries >= 0.3 %": int(big.sum()),
        "median rel error": float(np.median(rel)),
        "max rel error": float(rel.max()),
        "max abs error": float(np.abs(m.values - true)[off].max()),
        "interval coverage": float(covered.mean()),
        "seconds": seconds,
    }


def block_signal(signal: np.ndarray, size: int = BLOCK) -> np.ndarray:
    """True signal summed over size x size blocks, (C, blocks)."""
    c, n_y, n_x = signal.shape
    n_y, n_x = n_y // size, n_x // size
    crop = signal[:, : n_y * size, : n_x * size].astype(np.float64)
    return crop.reshape(c, n_y, size, n_x, size).sum(axis=(2, 4)).reshape(c, -1)


def revealable_pairs(signal: np.ndarray, true: np.ndarray, roles=None) -> np.ndarray:
    """(C, C) bool: entries >= 1 % the tissue can show.

    ``signal`` is the true signal in blocks (C, blocks) at the estimator's resolution.
    The source must carry a real stain and, among the blocks where its true signal is
    above its median over positive blocks, at least 10 % must hold no true signal of the
    receiver at all.
    """
    out = np.zeros(true.shape, bool)
    for i in range(true.shape[0]):
        if roles is not None and roles[i] not in ("stain", "specks", "rare"):
            continue
        positive = signal[i][signal[i] > 0]
        if positive.size == 0:
            continue
        bright = signal[i] > np.median(positive)
        for j in np.flatnonzero(true[i] >= 0.01):
            if j != i:
                out[i, j] = np.mean(signal[j][bright] == 0) >= 0.1
    return out


def revealable(folder: Path, channels, true: np.ndarray) -> np.ndarray:
    """Entries the pooled tissue of a cohort folder can show (see :func:`revealable_pairs`)."""
    info = json.loads((folder / "truth" / "truth.json").read_text())
    roles = {p["channel"]: p["role"] for p in info["stains"]}
    files = sorted((folder / "truth").glob("roi_*.npz"))
    names = list(np.load(files[0])["channels"])
    order = [names.index(c) for c in channels]
    blocks = np.concatenate([block_signal(np.load(f)["signal"][order]) for f in files], axis=1)
    return revealable_pairs(blocks, true, [roles.get(c) for c in channels])


def tissue_metrics(folder: Path) -> dict:
    rois = sorted((folder / "cohort").glob("*.ome.tiff"))
    start = time.perf_counter()
    m = estimate_from_tissue(rois)
    seconds = time.perf_counter() - start
    true = truth_matrix(folder, m.channels)
    off = ~np.eye(len(m.channels), dtype=bool)
    can = revealable(folder, m.channels, true)
    rel = np.abs(m.values - true)[can] / true[can]
    missed = int((can & (m.values == 0)).sum())
    false = off & (true == 0) & (m.values > 0)
    false_list = [f"{m.channels[i]}->{m.channels[j]} {m.values[i, j]:.4f}" for i, j in zip(*np.nonzero(false), strict=True)]
    return {
        "revealable entries >= 1 %": int(can.sum()),
        "median rel error": float(np.median(rel)) if rel.size else float("nan"),
        "max rel error": float(rel.max()) if rel.size else float("nan"),
        "within 25 %": f"{int((rel <= 0.25).sum())}/{rel.size}",
        "missed": missed,
        "false pairs": int(false.sum()),
        "false": ", ".join(false_list) or "-",
        "seconds": seconds,
    }


def show(title: str, metrics: dict) -> None:
    print(f"  {title}")
    for key, value in metrics.items():
        shown = f"{value:.4f}" if isinstance(value, float) else str(value)
        print(f"    {key:>28}: {shown}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--unseen", type=int, default=2, help="fresh cohorts to generate (0-2)")
    parser.add_argument("--skip-tissue", action="store_true")
    args = parser.parse_args(argv)
    cohorts = [("demo cohort (example_stack)", DEMO)]
    with tempfile.TemporaryDirectory(prefix="plexwash-recovery-") as tmp:
        if args.unseen:
            gen = load_generator()
            for k in range(min(args.unseen, len(UNSEEN_PANELS))):
                state = 9300 + k
                names = UNSEEN_PANELS[k]
                rng = np.random.default_rng(state)
                stains = gen.random_stains(names, rng, failed=names[len(names) // 2], dim=names[3],
                                         rare=names[-4], specks=names[7])
                folder = Path(tmp) / f"unseen_{state}"
                gen.simulate_cohort(folder, random_state=state, n_rois=3, size=320, stains=stains)
                cohorts.append((f"unseen cohort, random state {state}, {len(names)} channels", folder))
        for title, folder in cohorts:
            print(title)
            show("controls", controls_metrics(folder))
            if not args.skip_tissue:
                show("tissue", tissue_metrics(folder))
    return 0


if __name__ == "__main__":
    sys.exit(main())
