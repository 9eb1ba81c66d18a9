"""The Cohort widget's ROI list: ROI ids (paths relative to the cohort), batches from the
cohort's sample sheet, and the batch and flag filters. Plain functions (no Qt import), the
run's quality table read per ROI and stage, and an ROI's flags summed up in one line."""

from __future__ import annotations

from pathlib import Path

#: First entry of each filter combo: no filtering.
ALL_BATCHES, ANY_FLAGS = "all batches", "any flags"
#: Flag filter entries for every flagged ROI and for those without a flag.
FLAGGED, UNFLAGGED = "flagged", "ok"


def roi_entries(folder, rois) -> tuple[list[tuple[str, Path, str]], str | None]:
    """``(id, path, batch)`` of each ROI, and a problem with the sample sheet (or None).

    The id is the ROI's path relative to the cohort (:func:`plexwash.qc.io.roi_id`); the
    batch comes from the cohort's ``samples.csv`` (:func:`plexwash.qc.io.find_samples`,
    matched by :func:`plexwash.qc.io.match_samples`), ``""`` without one. A sheet that does
    not fit the cohort leaves every batch empty and its one-line error is returned.
    """
    from plexwash.qc.errors import InputError
    from plexwash.qc.io import find_samples, match_samples, roi_id

    folder = Path(folder)
    ids = [(roi_id(path, folder), Path(path)) for path in rois]
    batches: dict[str, dict] = {}
    problem = None
    try:
        sheet = find_samples(folder)
        if sheet is not None:
            batches = match_samples(sheet, ids, folder)
    except InputError as exc:
        problem = str(exc)
    return [(rid, path, str(batches.get(rid, {}).get("batch", ""))) for rid, path in ids], problem


def flag_names(text: str) -> set[str]:
    """The flags named in a flag cell (:func:`summarize_flags` text).

    Examples
    --------
    >>> sorted(flag_names("striped · empty: A, B"))
    ['empty', 'striped']
    >>> flag_names("ok"), flag_names("measuring…")
    (set(), set())
    """
    if text in ("", "ok", "—", "measuring…") or text.startswith("unreadable"):
        return set()
    return {part.split(":")[0].strip() for part in text.split(" · ") if part.strip()}


def flag_choices(cells: list[str]) -> list[str]:
    """The flag filter's entries for the flag cells shown: any, flagged, ok, then each flag.

    Examples
    --------
    >>> flag_choices(["ok", "striped · empty: A", "empty: B"])
    ['any flags', 'flagged', 'ok', 'empty', 'striped']
    """
    names = set()
    for text in cells:
        names |= flag_names(text)
    return [ANY_FLAGS, FLAGGED, UNFLAGGED, *sorted(names)]


def row_shown(batch: str, cells: list[str], batch_filter: str, flag_filter: str) -> bool:
    """Whether an ROI row passes the filters (its batch; its raw and washed flag cells).

    Examples
    --------
    >>> row_shown("B1", ["ok", "striped"], "B1", "striped"), row_shown("B2", ["ok"], "B1", ANY_FLAGS)
    (True, False)
    >>> row_shown("B1", ["ok", "ok"], ALL_BATCHES, FLAGGED), row_shown("B1", ["ok", "—"], ALL_BATCHES, "ok")
    (False, True)
    """
    if batch_filter not in ("", ALL_BATCHES) and batch != batch_filter:
        return False
    names = set().union(*(flag_names(text) for text in cells)) if cells else set()
    if flag_filter in ("", ANY_FLAGS):
        return True
    if flag_filter == FLAGGED:
        return bool(names)
    if flag_filter == UNFLAGGED:
        return not names
    return flag_filter in names


def refill(box, entries: list[str]) -> None:
    """Give a combo box these entries (when they changed), keeping its choice where it
    still exists, without signalling a change."""
    if [box.itemText(i) for i in range(box.count())] == entries:
        return
    chosen = box.currentText()
    box.blockSignals(True)
    box.clear()
    box.addItems(entries)
    box.setCurrentIndex(max(box.findText(chosen), 0))
    box.blockSignals(False)


def read_quality_table(path) -> dict[str, dict[str, list[dict]]]:
    """Rows of a run's ``quality.csv`` grouped as ``{roi: {stage: [row, ...]}}`` (flags as lists)."""
    from plexwash.qc.run import read_quality_csv

    out: dict[str, dict[str, list[dict]]] = {}
    for row in read_quality_csv(path):
        out.setdefault(row["roi"], {}).setdefault(row.get("stage") or "raw", []).append(row)
    return out


def summarize_flags(rows: list[dict]) -> str:
    """One line for an ROI's flags: ROI-level flags, then each channel flag with its channels.

    Examples
    --------
    >>> rows = [{"channel": "A", "flags": ["empty", "striped"]},
    ...         {"channel": "B", "flags": ["striped"]}, {"channel": "C", "flags": ["striped"]}]
    >>> summarize_flags(rows)
    'striped · empty: A'
    >>> summarize_flags([{"channel": "A", "flags": []}])
    'ok'
    """
    if not rows:
        return ""
    everywhere = set(rows[0]["flags"])
    for row in rows[1:]:
        everywhere &= set(row["flags"])
    if len(rows) == 1:
        from plexwash.qc.quality import ROI_FLAGS

        everywhere &= set(ROI_FLAGS)
    per_flag: dict[str, list[str]] = {}
    for row in rows:
        for flag in row["flags"]:
            if flag not in everywhere:
                per_flag.setdefault(flag, []).append(str(row.get("label") or row["channel"]))
    parts = sorted(everywhere)
    for flag, channels in per_flag.items():
        shown = ", ".join(channels[:3]) + (f" +{len(channels) - 3}" if len(channels) > 3 else "")
        parts.append(f"{flag}: {shown}")
    return " · ".join(parts) if parts else "ok"
