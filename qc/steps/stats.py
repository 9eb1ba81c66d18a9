"""Per-channel numbers of a step: its own stats plus the fraction of signal it removed.

The in-memory wash and the staged wash both turn a step's stats and two sums per channel
(removed signal, signal entering the step) into the same rows, here.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .._arrays import is_dask

__all__ = ["finish_stats", "step_rows"]


def step_rows(step_stats, removed_sum, input_sum, *, worked: Sequence[int],
              channels: Sequence[int], all_names: Sequence[str]) -> list[dict]:
    """One dict per channel of ``channels`` (ROI indices, output order) with the removed fraction.

    ``step_stats``, ``removed_sum`` and ``input_sum`` follow ``worked`` (the ROI indices
    the step ran on, in order); a channel outside it did not take part (``ran`` False).
    The fraction is the channel's removed signal over its signal entering the step, so
    the numbers do not depend on chunking or on the step's own bookkeeping. Dask sums
    stay lazy until computed (then :func:`finish_stats`).
    """
    position = {i: k for k, i in enumerate(worked)}
    rows = []
    for i in channels:
        k = position.get(i)
        if k is None:
            rows.append({"channel": all_names[i], "ran": False, "removed_fraction": 0.0})
            continue
        row = {"channel": all_names[i], "ran": True}
        row.update(_plain(step_stats[k]) if step_stats is not None else {})
        row["removed_sum"] = removed_sum[k]
        row["input_sum"] = input_sum[k]
        rows.append(row)
    if not is_dask(removed_sum):
        finish_stats(rows)
    return rows


def _plain(stats) -> dict:
    return dict(stats) if isinstance(stats, Mapping) else dict(vars(stats))


def finish_stats(rows: list[dict]) -> list[dict]:
    """Turn computed sums into ``removed_fraction`` (in place) and plain Python numbers."""
    for row in rows:
        if "removed_sum" in row:
            removed, total = float(row.pop("removed_sum")), float(row.pop("input_sum"))
            row["removed_fraction"] = removed / total if total > 0 else 0.0
        for key, value in list(row.items()):
            if isinstance(value, np.generic):
                row[key] = value.item()
    return rows
