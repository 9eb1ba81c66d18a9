"""Score a washed stack against the generator's ground truth.

Used by ``benchmarks/accuracy.py`` and the wash accuracy tests. Only numpy; the truth
dict is the one :func:`generate.simulate_roi` returns (or a committed ``truth/roi_NN.npz``
loaded into a dict).

What is measured (all in counts, row drop-outs included in the expectation):

- ``speckle_removed``: over pixels where no signal of any channel reaches the channel
  (its expected mean ``S^T x`` is 0) and that are not hot pixels, one minus the washed
  counts left there over the background speckle counts drawn there.
- ``hot_neutralised``: fraction of hot pixels whose washed value exceeds the pixel's own
  true signal by less than 10 % of the spike plus three Poisson standard deviations.
- ``retained``: per channel with a stain, washed counts over its own true signal (``x``)
  on the pixels where that signal is positive (hot pixels left out); 1.0 is perfect.
- ``specks_kept``: fraction of tiny real objects (granules) keeping at least half of
  their true signal.
- ``ghost_left``: for a failed stain, washed counts left where other channels spill into
  it, over the spilled (ghost) counts in the raw data.
"""

from __future__ import annotations

import numpy as np


def score_wash(washed, truth: dict) -> dict:
    """Metrics of one washed (C, Y, X) stack against its truth (see module docstring)."""
    washed = np.asarray(washed, dtype=np.float64)
    rows = np.asarray(truth["row_factor"], float)[None, :, None]
    own = np.asarray(truth["signal"], float) * rows
    expected = np.asarray(truth["mean"], float) * rows
    background = np.asarray(truth["background"], float)
    channels = list(truth["channels"])
    hot = np.asarray(truth["hot_pixels"], dtype=np.int64).reshape(-1, 5)
    hot_mask = np.zeros(washed.shape, bool)
    hot_mask[hot[:, 0], hot[:, 1], hot[:, 2]] = True

    quiet = (expected == 0) & ~hot_mask
    left = float(washed[quiet].sum())
    drawn = float(background[quiet].sum())
    speckle_removed = 1.0 - left / drawn if drawn > 0 else 1.0

    c, y, x, added = hot[:, 0], hot[:, 1], hot[:, 2], hot[:, 3].astype(float)
    excess = washed[c, y, x] - own[c, y, x]
    ok = excess < 0.1 * added + 3.0 * np.sqrt(own[c, y, x] + 1.0)
    hot_neutralised = float(ok.mean()) if len(ok) else 1.0

    retained = {}
    for k, name in enumerate(channels):
        mask = (own[k] > 0) & ~hot_mask[k]
        if mask.sum() == 0:
            continue
        retained[name] = float(washed[k][mask].sum() / own[k][mask].sum())

    specks_kept = None
    labels = np.asarray(truth.get("specks", np.zeros(washed.shape[1:], int)))
    speck_channels = list(truth.get("specks_channel") or [])
    if speck_channels and labels.max() > 0:
        k = channels.index(speck_channels[0])
        index = np.arange(1, int(labels.max()) + 1)
        from scipy import ndimage

        kept = ndimage.sum(washed[k], labels, index)
        true = ndimage.sum(own[k], labels, index)
        valid = true > 0
        specks_kept = float(np.mean(kept[valid] >= 0.5 * true[valid]))

    ghost_left = {}
    for name in truth.get("failed") or []:
        k = channels.index(name)
        mask = (expected[k] > 0) & ~hot_mask[k]
        ghost = expected[k][mask].sum()
        if ghost > 0:
            ghost_left[name] = float(washed[k][mask].sum() / ghost)

    return {
        "speckle_removed": speckle_removed,
        "hot_neutralised": hot_neutralised,
        "retained": retained,
        "specks_kept": specks_kept,
        "ghost_left": ghost_left,
    }


def load_truth(path) -> dict:
    """A committed ``truth/roi_NN.npz`` as the dict :func:`generate.simulate_roi` returns.

    The expected mean ``S^T x`` is rebuilt from ``truth/spillover.csv``; the failed and
    speck channels come from ``truth/truth.json`` beside it.
    """
    import csv
    import json
    from pathlib import Path

    path = Path(path)
    with np.load(path, allow_pickle=False) as data:
        truth = {k: data[k] for k in data.files}
    channels = [str(c) for c in truth["channels"]]
    truth["channels"] = channels
    info = json.loads((path.parent / "truth.json").read_text())
    truth["failed"] = list(info.get("failed") or [])
    truth["specks_channel"] = [info["specks"]] if isinstance(info.get("specks"), str) else list(info.get("specks") or [])
    with open(path.parent / "spillover.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    receivers = rows[0][1:]
    matrix = {r[0]: dict(zip(receivers, map(float, r[1:]), strict=True)) for r in rows[1:]}
    spill = np.array([[matrix[a][b] for b in channels] for a in channels])
    truth["spillover"] = spill
    truth["mean"] = np.tensordot(spill, truth["signal"].astype(np.float64), axes=(0, 0))
    return truth
