"""Hand-off to segmentation and cell-level analysis: composites and transformed stacks.

When the stain sheet gives roles (``role`` column: ``nuclear`` or ``membrane``), a run
writes ``<roi>.composite.ome.tiff`` beside each washed stack: two float32 channels named
``nuclear`` and ``membrane`` in [0, 1], what segmenters take as input.

How it is built: :mod:`plexwash.qc.composite` (clip each contributing channel at its
percentiles, scale to [0, 1], combine by mean or max). Here, after the washes, the
percentiles are taken over the whole cohort (recipe section ``[composite]``, defaults 1st
and 99.5th): every done ROI's washed output is read back at level 0, one channel plane at
a time, into a :class:`~plexwash.qc.composite.PercentileSketch`. One set for the whole
cohort, so ROIs are comparable; every run rebuilds every composite with the current set.

The percentiles used are appended to the ledger (one line ``{"event": "composites", ...}``
without an ``roi`` key, so readers of ROI records skip it) and shown in the report.

Transformed export: ``[output] transform = "arcsinh"`` writes ``<roi>.arcsinh.ome.tiff``:
``arcsinh(x / cofactor)`` of every channel of the washed stack, float32, ``cofactor`` per
channel (``[output.channels.<tag>] cofactor``, default 5: the usual convention for mass
cytometry counts, Bendall et al., Science 332:687, 2011). The washed stack itself is never
transformed.
"""

from __future__ import annotations

import datetime as _dt
import json
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from ..composite import (
    ROLES,
    PercentileSketch,
    arcsinh_name,
    arcsinh_stack,
    build_composite,
    composite_name,
    role_channels,
)


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
    # files an earlier run wrote that this recipe and stain sheet no longer ask for go
    if not by_role:
        _drop_stale(out / composite_name(r["roi"]) for r in done)
    if recipe.output.transform != "arcsinh":
        _drop_stale(out / arcsinh_name(r["roi"]) for r in done)
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


def _drop_stale(paths) -> None:
    from ..files import remove_path, written_by_plexwash

    for path in paths:
        if path.is_file() and written_by_plexwash(path):
            remove_path(path)


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
