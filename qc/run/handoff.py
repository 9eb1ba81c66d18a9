"""Hand-off to segmentation and cell-level analysis: composites and transformed stacks.

When the stain sheet gives roles (``role`` column: ``nuclear`` or ``membrane``), a run
writes ``<roi>.composite.ome.tiff`` beside each washed stack: two float32 channels named
``nuclear`` and ``membrane`` in [0, 1], what segmenters take as input.

How a composite is built (recipe section ``[composite]``)
--------------------------------------------------------
1. **Cohort-wide percentiles.** For each contributing channel, the ``low_percentile`` and
   ``high_percentile`` (defaults 1st and 99.5th) of its *washed* values over every pixel
   of every done ROI of the run. They are found after the washes, by reading back level 0
   of each washed output one channel plane at a time into a histogram sketch
   (:class:`PercentileSketch`: bins uniform in ``log1p(value)``, ``SKETCH_BINS`` over the
   float32 range, relative resolution about 1e-4; linear interpolation inside a bin as
   ``numpy.percentile``'s default). One set for the whole cohort, so ROIs are comparable.
2. **Scale.** ``clip((x - low) / (high - low), 0, 1)`` per channel (a channel with
   ``high <= low`` scales to 0).
3. **Combine.** The scaled channels of one role are averaged (``combine = "mean"``) or
   their pixelwise maximum taken (``"max"``).

The percentiles used are appended to the ledger (one line ``{"event": "composites", ...}``
without an ``roi`` key, so readers of ROI records skip it) and shown in the report.

Transformed export: ``[output] transform = "arcsinh"`` writes ``<roi>.arcsinh.ome.tiff``:
``arcsinh(x / cofactor)`` of every channel of the washed stack, float32, ``cofactor`` per
channel (``[output.channels.<tag>] cofactor``, default 5: the usual convention for mass
cytometry counts, Bendall et al., Science 332:687, 2011). The washed stack itself is never
transformed.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..settings import setting

ROLES = ("nuclear", "membrane")
COMPOSITE_SUFFIX = ".composite.ome.tiff"
ARCSINH_SUFFIX = ".arcsinh.ome.tiff"
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


def handoff_names(rois: Sequence[str], recipe, roles: Sequence[str]) -> list[str]:
    """The hand-off files a run writes for its ROIs (for the output guard)."""
    names = []
    if not recipe.output.enabled:
        return names
    if any(roles):
        names += [composite_name(r) for r in rois]
    if recipe.output.transform == "arcsinh":
        names += [arcsinh_name(r) for r in rois]
    return names


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


def cohort_percentiles(outputs: Sequence[Path], channels: Sequence[str], *, low: float,
                       high: float) -> dict[str, tuple[float, float]]:
    """Cohort-wide (low, high) percentiles of each named channel over the washed outputs
    (level 0, read back one plane at a time into a :class:`PercentileSketch`)."""
    from ..io import read_roi

    sketches = {name: PercentileSketch() for name in channels}
    for path in outputs:
        roi = read_roi(path)
        for name in channels:
            sketches[name].add(np.asarray(roi.data[roi.channels.index(name)]))
    return {name: (s.percentile(low), s.percentile(high)) for name, s in sketches.items()}


def write_handoff(out_dir, done: Sequence[Mapping], recipe, *, roles: Sequence[str] | None = None,
                  channels: Sequence[str] | None = None) -> dict | None:
    """Write the composites (and arcsinh stacks) of a run's done ROIs; return the ledger event.

    Parameters
    ----------
    out_dir : Path
        The run folder.
    done : sequence of mapping
        The latest ``done`` ledger records (``roi``, ``output``, ``channels``).
    recipe : Recipe
        ``[composite]`` and ``[output]`` settings.
    roles, channels : sequence of str
        Each channel's role (from the run's stain sheet) and the tags they belong to.

    Returns
    -------
    dict or None
        ``{"event": "composites", "percentiles": {tag: [low, high]}, ...}`` when composites
        were written, else None.
    """
    from ..io import read_roi, write_ome_tiff

    out = Path(out_dir)
    done = [r for r in done if r.get("output")]
    roles = list(roles or [])
    by_role = role_channels(roles) if roles else {}
    event = None
    if by_role and done:
        settings = recipe.composite
        names = {channels[i]: role for role, idx in by_role.items() for i in idx}
        percentiles = cohort_percentiles([out / r["output"] for r in done], list(names),
                                         low=settings.low_percentile, high=settings.high_percentile)
        for record in done:
            washed = read_roi(out / record["output"])
            planes = {n: np.asarray(washed.data[washed.channels.index(n)]) for n in names}
            composite = build_composite(planes, names, percentiles, combine=settings.combine)
            write_ome_tiff(out / composite_name(record["roi"]), composite, list(ROLES),
                           pixel_size=washed.pixel_size,
                           provenance={"composite_of": record["output"],
                                       "percentiles": json.dumps(
                                           {n: list(v) for n, v in percentiles.items()})})
        event = {"event": "composites", "rois": [r["roi"] for r in done],
                 "roles": names, "combine": settings.combine,
                 "low_percentile": settings.low_percentile,
                 "high_percentile": settings.high_percentile,
                 "percentiles": {n: [float(lo), float(hi)] for n, (lo, hi) in percentiles.items()},
                 "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")}
    if recipe.output.transform == "arcsinh":
        for record in done:
            washed = read_roi(out / record["output"])
            cofactors = [recipe.for_channel("output", c).cofactor for c in washed.channels]
            write_ome_tiff(out / arcsinh_name(record["roi"]), arcsinh_stack(washed.data, cofactors),
                           list(washed.channels), labels=list(washed.labels),
                           pixel_size=washed.pixel_size,
                           provenance={"transform_of": record["output"], "transform": "arcsinh",
                                       "cofactors": json.dumps(dict(zip(washed.channels, cofactors,
                                                                        strict=True)))})
    return event


def read_composite_event(out_dir) -> dict | None:
    """The last composites event of a run folder's ledger (None when there is none)."""
    from ..ledger import LEDGER

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


def check_markers(recipe, stains, first_roi, rois: Sequence[str]) -> list[str]:
    """Check a run's roles and audit pairs before anything is written; return the extra
    files the run will write (composites, arcsinh stacks, ``audit.csv``) for the guard.

    Raises
    ------
    InputError
        Roles set but one role without a channel (naming the stain sheet); an audit pair
        naming a marker the first ROI does not have, or one marker twice (naming the recipe).
    """
    from ..audit import AUDIT, resolve_pairs
    from ..io import read_roi

    roles = tuple(stains.roles) if stains is not None else ()
    role_channels(roles, where=getattr(stains, "path", None) or "stains.csv")
    extra = handoff_names(rois, recipe, roles)
    if recipe.audit.exclusive and first_roi is not None:
        roi = read_roi(first_roi, stains=stains, lazy=True)
        resolve_pairs(recipe.audit.exclusive, roi.channels, roi.labels,
                      where=recipe.source or "recipe")
        extra.append(AUDIT)
    return extra


def write_run_handoff(out_dir) -> list[str]:
    """After a run's washes: ``audit.csv``, the composites with their cohort-wide
    percentiles (a ledger event) and the arcsinh stacks. Returns lines for the run log."""
    from ..audit import write_audit_table
    from ..io import read_stains
    from ..ledger import LEDGER, RECIPE, STAINS_COPY, Ledger, latest_records, read_ledger
    from ..recipe import load_recipe

    out = Path(out_dir)
    lines = []
    audit = write_audit_table(out)
    if audit is not None:
        lines.append(f"wrote {audit.name}")
    recipe = load_recipe(out / RECIPE)
    latest = latest_records(read_ledger(out))
    done = [latest[n] for n in sorted(latest) if latest[n].get("status") == "done"]
    stains = read_stains(out / STAINS_COPY) if (out / STAINS_COPY).is_file() else None
    event = write_handoff(out, done, recipe, roles=stains.roles if stains else None,
                          channels=stains.tags if stains else None)
    if event is not None:
        Ledger(out / LEDGER).append(event)
        lines.append("wrote composites of {} ROI(s); cohort-wide percentiles {}".format(
            len(event["rois"]), ", ".join(f"{n} {lo:.4g}-{hi:.4g}"
                                          for n, (lo, hi) in event["percentiles"].items())))
    if recipe.output.transform == "arcsinh" and done:
        lines.append(f"wrote arcsinh stacks of {sum(1 for r in done if r.get('output'))} ROI(s)")
    return lines
