"""Composites for segmentation and the arcsinh transform: plain numpy functions on planes.

A composite is two float32 images in [0, 1], ``nuclear`` and ``membrane``, built from the
channels the stain sheet gives those roles (recipe section ``[composite]``):

1. **Percentiles.** Each contributing channel is clipped at its ``low_percentile`` and
   ``high_percentile`` (defaults 1st and 99.5th). A run takes them over the whole cohort
   (:mod:`plexwash.qc.run.handoff`), through a :class:`PercentileSketch` (bins uniform in
   ``log1p(value)``, ``SKETCH_BINS`` over the float32 range, relative resolution about
   1e-4, exact zeros counted apart; linear interpolation inside a bin as
   ``numpy.percentile``'s default does between sorted values).
2. **Scale.** ``clip((x - low) / (high - low), 0, 1)`` per channel (0 when ``high <= low``).
3. **Combine.** The scaled channels of one role are averaged (``combine = "mean"``) or
   their pixelwise maximum taken (``"max"``).

The arcsinh transform for cell-level analysis is ``arcsinh(x / cofactor)`` per channel
(cofactor 5 by default, the usual one for mass cytometry counts: Bendall et al., Science
332:687, 2011).

File names and the ledger event of a run's hand-off live here too, so that the run
(:mod:`plexwash.qc.run.handoff`) and the report read them from one place.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .errors import InputError
from .io.cohort import ARCSINH_SUFFIX, COMPOSITE_SUFFIX
from .settings import setting

ROLES = ("nuclear", "membrane")
#: Bins of the percentile sketch over log1p of the float32 range.
SKETCH_BINS = 2**20
_LOG_TOP = float(np.log1p(np.finfo(np.float32).max))


@dataclasses.dataclass(frozen=True)
class CompositeSettings:
    """The segmentation composites (recipe section ``[composite]``)."""

    low_percentile: float = setting(
        1.0, "each contributing channel is clipped below at this cohort-wide percentile",
        low=0.0, high=100.0)
    high_percentile: float = setting(
        99.5, "... and above at this one, then scaled to [0, 1]", low=0.0, high=100.0)
    combine: str = setting("mean", "how the scaled channels of one role are combined",
                           choices=("mean", "max"))

    def __post_init__(self):
        if not self.low_percentile < self.high_percentile:
            raise InputError("recipe", f"composite.low_percentile ({self.low_percentile:g}) must be "
                             f"below composite.high_percentile ({self.high_percentile:g})")


def role_channels(roles: Sequence[str], *, where=None) -> dict[str, list[int]]:
    """Channel indices of each role; empty when no role is set.

    Raises
    ------
    InputError
        When roles are set but one role has no channel (both composites need one).

    Examples
    --------
    >>> role_channels(["nuclear", "", "membrane", "membrane"])
    {'nuclear': [0], 'membrane': [2, 3]}
    >>> role_channels(["", ""])
    {}
    """
    found = {role: [i for i, r in enumerate(roles) if r == role] for role in ROLES}
    if not any(found.values()):
        return {}
    missing = [role for role, idx in found.items() if not idx]
    if missing:
        raise InputError(where or "stains.csv", f"the role column sets "
                         f"{' and '.join(r for r in ROLES if found[r])} but no channel is "
                         f"{' or '.join(missing)} (each composite needs at least one channel)")
    return found


def composite_name(roi: str) -> str:
    """``<roi>.composite.ome.tiff``, beside the washed stack."""
    return roi + COMPOSITE_SUFFIX


def arcsinh_name(roi: str) -> str:
    """``<roi>.arcsinh.ome.tiff``, beside the washed stack."""
    return roi + ARCSINH_SUFFIX


class PercentileSketch:
    """Percentiles of many non-negative values seen in pieces, in fixed memory.

    Values are counted in ``SKETCH_BINS`` bins uniform in ``log1p(value)`` over the float32
    range; a percentile interpolates linearly inside its bin between the bin's edges, as
    ``numpy.percentile`` (method ``linear``) does between sorted values.

    Examples
    --------
    >>> s = PercentileSketch(); s.add(np.arange(1001, dtype=np.float32))
    >>> round(s.percentile(50), 1)
    500.0
    """

    def __init__(self, bins: int = SKETCH_BINS):
        self.bins = bins
        self.counts = np.zeros(bins + 1, np.int64)  # bin 0: exact zeros (common after a wash)
        self.total = 0
        self.low, self.high = np.inf, -np.inf

    def add(self, values) -> None:
        values = np.asarray(values, np.float64).ravel()
        if values.size == 0:
            return
        values = np.maximum(values, 0.0)
        level = np.log1p(values)
        index = 1 + np.minimum((level * (self.bins / _LOG_TOP)).astype(np.int64), self.bins - 1)
        index[values <= 0] = 0
        self.counts += np.bincount(index, minlength=self.bins + 1)
        self.total += values.size
        self.low, self.high = min(self.low, float(values.min())), max(self.high, float(values.max()))

    def percentile(self, q: float) -> float:
        """The q-th percentile (0-100) of the values added."""
        if self.total == 0:
            return float("nan")
        rank = q / 100.0 * (self.total - 1)  # position among the sorted values, 0-based
        cumulative = np.cumsum(self.counts)
        b = min(int(np.searchsorted(cumulative, rank, side="right")), self.bins)
        if b == 0:
            return 0.0
        before = cumulative[b] - self.counts[b]
        inside = (rank - before + 0.5) / max(int(self.counts[b]), 1)
        low = max(float(np.expm1((b - 1) * _LOG_TOP / self.bins)), self.low)
        high = min(float(np.expm1(b * _LOG_TOP / self.bins)), self.high)
        return float(low + min(max(inside, 0.0), 1.0) * max(high - low, 0.0))


def scale_channel(image, low: float, high: float) -> np.ndarray:
    """``clip((image - low) / (high - low), 0, 1)`` as float32 (all 0 when high <= low)."""
    image = np.asarray(image, np.float64)
    if not high > low:
        return np.zeros(image.shape, np.float32)
    return np.clip((image - low) / (high - low), 0.0, 1.0).astype(np.float32)


def build_composite(planes: Mapping[str, object], roles: Mapping[str, str],
                    percentiles: Mapping[str, tuple[float, float]], *, combine: str = "mean"
                    ) -> np.ndarray:
    """The (2, Y, X) float32 composite (``nuclear``, ``membrane``) of one ROI.

    Parameters
    ----------
    planes : mapping
        Channel name -> its washed image (only contributing channels are needed).
    roles : mapping
        Channel name -> ``nuclear`` or ``membrane``.
    percentiles : mapping
        Channel name -> (low, high) values it is clipped at.
    combine : {"mean", "max"}

    Examples
    --------
    >>> p = {"N": np.array([[0.0, 10.0]]), "M": np.array([[5.0, 5.0]])}
    >>> build_composite(p, {"N": "nuclear", "M": "membrane"}, {"N": (0, 10), "M": (0, 10)})[:, 0]
    array([[0. , 1. ],
           [0.5, 0.5]], dtype=float32)
    """
    out = []
    for role in ROLES:
        names = [n for n, r in roles.items() if r == role]
        if not names:
            raise InputError("stains.csv", f"no channel has the role {role}")
        scaled = [scale_channel(planes[n], *percentiles[n]) for n in names]
        stack = np.stack(scaled)
        out.append(stack.max(axis=0) if combine == "max" else stack.mean(axis=0, dtype=np.float64))
    return np.stack(out).astype(np.float32)


def arcsinh_stack(stack, cofactors: Sequence[float]) -> np.ndarray:
    """``arcsinh(x / cofactor)`` per channel, float32 (Bendall et al., Science 2011)."""
    out = np.empty(tuple(int(s) for s in stack.shape), np.float32)
    for c, cofactor in enumerate(cofactors):
        if not cofactor > 0:
            raise InputError("recipe", f"output.cofactor must be > 0, got {cofactor!r}")
        out[c] = np.arcsinh(np.asarray(stack[c], np.float64) / cofactor)
    return out


def read_composite_event(out_dir) -> dict | None:
    """The last composites event of a run folder's ledger (None when there is none)."""
    from .ledger import LEDGER

    path = Path(out_dir) / LEDGER
    if not path.is_file():
        return None
    found = None
    with open(path, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            if not line.endswith("\n"):
                break
            try:
                record = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(record, dict) and record.get("event") == "composites":
                found = record
    return found
