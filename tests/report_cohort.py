"""A synthetic run folder of many small ROIs, for the report at scale (test and benchmark).

Ledger records, quality rows, tiny washed stacks and a sample sheet copy, as a run writes
them, so the report (not the wash) is what gets exercised. Three batches (``B3`` brighter
in the first three channels), ROIs spread over slide subfolders, one failed ROI (index 7).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

N_ROIS, N_SLIDES = 500, 20
CHANNELS = tuple(f"Ch{k:02d}" for k in range(12))
#: The ROI whose record says it failed.
FAILED = 7


def roi_id(k: int, n_slides: int = N_SLIDES) -> str:
    """The id of the k-th ROI (``slideSS/rKKK``)."""
    return f"slide{k % n_slides:02d}/r{k:03d}"


def build_run_folder(out: Path, n_rois: int = N_ROIS, channels=CHANNELS, *, seed: int = 500) -> Path:
    """Write a finished run folder of ``n_rois`` ROIs into ``out`` (created) and return it."""
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.run import Ledger
    from plexwash.qc.run.batches import samples_csv_text
    from plexwash.qc.table import SAMPLES_COPY, write_quality_table

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    channels = list(channels)
    rng = np.random.default_rng(seed)
    ledger = Ledger(out / "ledger.jsonl")
    samples = {}
    for k in range(n_rois):
        rid = roi_id(k)
        batch = f"B{1 + k % 3}"
        samples[rid] = {"batch": batch, "patient": f"P{k % 40}"}
        bright = 2.0 if batch == "B3" else 1.0
        stack = rng.poisson(3.0 * bright, (len(channels), 24, 24)).astype(np.float32)
        write_ome_tiff(out / f"{rid}.ome.tiff", stack, channels)
        quality = [{"roi": rid, "channel": c, "stage": stage,
                    "sbr": float(rng.lognormal(2.0, 0.3)) * (bright if j < 3 else 1.0),
                    "snr": float(rng.lognormal(1.0, 0.3)), "background_mean": float(rng.normal(3, 0.2)),
                    "p99": float(rng.lognormal(3.0, 0.2)) * (bright if j < 3 else 1.0),
                    "flags": ["low-sbr"] if rng.random() < 0.02 else []}
                   for stage in ("raw", "washed") for j, c in enumerate(channels)]
        ledger.append({"roi": rid, "status": "done" if k != FAILED else "failed",
                       "error": "broken file" if k == FAILED else None,
                       "input": str(out / "gone" / f"{rid}.ome.tiff"), "output": f"{rid}.ome.tiff",
                       "channels": channels, "labels": channels, "shape": [len(channels), 24, 24],
                       "median_sbr": {"raw": 7.0, "washed": 8.0}, "seconds": 0.1,
                       "removed_fraction": {"speckle": {c: float(rng.uniform(0, 0.05)) for c in channels}},
                       "sample": samples[rid], "quality": quality})
    (out / SAMPLES_COPY).write_text(samples_csv_text(("batch", "patient"), samples))
    write_quality_table(out)
    return out
