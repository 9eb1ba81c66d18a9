"""Rows of the quality table (``quality.csv``, ``inspect --json``, the studio) from results."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .channel import ChannelQuality
from .settings import FLAG_SEPARATOR
from .stack import StackQuality, measure_stack


def quality_rows(stack_quality: StackQuality, *, roi: str, stage: str,
                 join_flags: bool = False) -> list[dict]:
    """Rows of the quality table for one ROI and stage (``raw`` / ``washed``).

    Each row has ``roi, channel, stage, sbr, snr, flags`` first, then the other
    metrics of :class:`ChannelQuality`, then ``striped_rows`` and
    ``striped_columns`` (the ROI's line indices). ``flags`` holds the channel's
    flags followed by the ROI-level flags, as a list (ready for ``inspect
    --json``) or, with ``join_flags=True``, as one ``';'``-joined string (for
    ``quality.csv``; the index lists are joined the same way). ``ghost_sources``
    is text ``"name:fraction"`` joined by ``';'``. Values are plain Python
    numbers and strings, JSON-ready: an undefined metric (e.g. ``foreground_snr``
    without foreground) is None (an empty cell in CSV).

    Examples
    --------
    >>> rng = np.random.default_rng(2)
    >>> stack = rng.poisson(0.1, (1, 64, 64)).astype(np.uint16)
    >>> rows = quality_rows(measure_stack(stack, ["Nd145"]), roi="roi_01", stage="raw")
    >>> rows[0]["channel"], rows[0]["flags"]
    ('Nd145', ['empty'])
    """
    out = []
    for cq in stack_quality.channels:
        flags = list(cq.flags) + [f for f in stack_quality.flags if f not in cq.flags]
        rows = list(stack_quality.striped_rows)
        columns = list(stack_quality.striped_columns)
        ghosts = FLAG_SEPARATOR.join(f"{n}:{s:.4g}" for n, s in cq.ghost_sources)
        row = {"roi": str(roi), "channel": cq.name, "stage": str(stage),
               "sbr": plain_number(cq.sbr), "snr": plain_number(cq.snr),
               "flags": FLAG_SEPARATOR.join(flags) if join_flags else flags}
        for field in dataclasses.fields(ChannelQuality):
            if field.name in row or field.name in ("name", "flags", "ghost_sources"):
                continue
            row[field.name] = plain_number(getattr(cq, field.name))
        row["ghost_sources"] = ghosts
        row["striped_rows"] = (FLAG_SEPARATOR.join(map(str, rows)) if join_flags else rows)
        row["striped_columns"] = (FLAG_SEPARATOR.join(map(str, columns)) if join_flags
                                  else columns)
        out.append(row)
    return out


def plain_number(value):
    """A plain Python number for JSON and CSV; NaN and infinity become None."""
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    value = float(value)
    return value if math.isfinite(value) else None


@dataclasses.dataclass(frozen=True)
class RoiQuality:
    """Quality of one ROI, raw and (when a washed stack was given) washed.

    Attributes
    ----------
    raw, washed : StackQuality
        The measurements (``washed`` None when only the raw stage was measured).
    raw_rows, washed_rows : list of dict
        Their rows of the quality table (:func:`quality_rows`), each with the channel's
        stain sheet ``marker``.
    """

    raw: StackQuality
    washed: StackQuality | None
    raw_rows: list
    washed_rows: list

    @property
    def flags(self) -> dict[str, list[str]]:
        """ROI-level flags per stage measured."""
        out = {"raw": list(self.raw.flags)}
        if self.washed is not None:
            out["washed"] = list(self.washed.flags)
        return out


def measure_roi(roi, recipe, *, spillover=None, washed=None, threads: int = 1) -> RoiQuality:
    """Quality of one ROI the way a run measures it: raw, then washed judged against raw.

    The one entry point behind ``plexwash inspect``, the rows of a run's ``quality.csv``
    and the studio's Quality widget, so the three agree.

    Parameters
    ----------
    roi : Roi
        The raw ROI (its dtype gives the detector maximum for saturation).
    recipe : Recipe
        ``[quality]`` thresholds, per channel where the recipe overrides them.
    spillover : SpilloverMatrix, optional
        When it covers every channel of the ROI, the raw stage's ghost model uses its
        pattern (see :func:`measure_stack`).
    washed : (C, Y, X) array_like, optional
        The washed stack (numpy or dask, e.g. read back from the written file). Channels
        empty in raw stay empty in washed (a wash cannot create a stain).
    threads : int, optional
        Threads of the measurements; the results do not depend on it.

    Returns
    -------
    RoiQuality
    """
    settings = recipe.quality
    per_channel = recipe.for_channels("quality", roi.channels)
    dtype = np.dtype(roi.data.dtype)
    dtype_max = float(np.iinfo(dtype).max) if dtype.kind in "ui" else None

    def measure(stack, **extra):
        return measure_stack(stack, roi.channels, settings=settings, channel_settings=per_channel,
                             dtype_max=dtype_max, threads=threads, **extra)

    raw = measure(roi.data, spillover=_aligned_matrix(spillover, roi.channels))
    washed_quality = measure(washed, reference=raw) if washed is not None else None
    stages = [("raw", raw)] + ([("washed", washed_quality)] if washed is not None else [])
    rows = {}
    for stage, result in stages:
        rows[stage] = quality_rows(result, roi=roi.name, stage=stage)
        for row, label in zip(rows[stage], roi.labels, strict=True):
            row["label"] = label
    return RoiQuality(raw, washed_quality, rows["raw"], rows.get("washed", []))


def _aligned_matrix(matrix, channels):
    """The spillover values over all of the ROI's channels, or None when not all are covered."""
    if matrix is None:
        return None
    index = {c: i for i, c in enumerate(matrix.channels)}
    if any(c not in index for c in channels):
        return None
    order = [index[c] for c in channels]
    return np.asarray(matrix.values, float)[np.ix_(order, order)]
