"""The run's quality table, ``quality.csv``: rows from the ledger, cohort outliers, CSV.

One row per ROI x channel x stage (``raw`` / ``washed``), rebuilt from each ROI's latest
``done`` ledger record at the end of every run; the report reads it back. Neither the
run nor the report is imported here, so both can use it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

from .files import write_atomic
from .ledger import QUALITY, latest_records, read_ledger

#: Quality-table columns written first, in this order; the others follow as measured.
QUALITY_FIRST_COLUMNS = ("roi", "channel", "label", "stage", "sbr", "snr", "flags", "sbr_modified_z")
#: Cohort outliers: modified z-score of log(SBR) per channel and stage, |M| > 3.5
#: (Iglewicz & Hoaglin 1993; NIST/SEMATECH e-Handbook 1.3.5.17).
OUTLIER_METRIC, OUTLIER_CUTOFF = "sbr", 3.5
#: Fewer ROIs than this are too few to call any one an outlier (with 3 values the MAD is
#: set by a single deviation); the scores are still written (common practice).
OUTLIER_MIN_ROIS = 5

def quality_table(out_dir) -> list[dict]:
    """Quality rows of a run folder: every done ROI's raw and washed rows, outliers flagged.

    Rows come from each ROI's latest ``done`` ledger record.
    Cohort outliers are judged per channel and stage on log(SBR) with the modified
    z-score (``|M| > 3.5``, once the cohort has ``OUTLIER_MIN_ROIS`` ROIs); ``flags``
    gains ``outlier`` and every row carries ``sbr_modified_z``. Washed rows also carry
    each step's removed fraction.
    """
    from .quality import add_outlier_flags

    latest = latest_records(read_ledger(out_dir))
    rows = []
    for name in sorted(latest):
        record = latest.get(name)
        if record is None or record.get("status") != "done":
            continue
        removed = record.get("removed_fraction") or {}
        for row in record.get("quality", []):
            row = dict(row)
            if row.get("stage") == "washed":
                for step, values in removed.items():
                    row[f"removed_{step}"] = values.get(row["channel"])
            rows.append(row)
    if not rows:
        return []
    enough = len({row["roi"] for row in rows}) >= OUTLIER_MIN_ROIS
    flagged = add_outlier_flags(rows, metric=OUTLIER_METRIC, log_scale=True,
                                cutoff=OUTLIER_CUTOFF if enough else math.inf)
    for row in flagged:
        row["sbr_modified_z"] = row.pop("modified_z")
    return flagged


def write_quality_table(out_dir) -> Path:
    """Write ``quality.csv`` of a run folder from its ledger, atomically."""
    rows = quality_table(out_dir)
    path = Path(out_dir) / QUALITY
    write_atomic(path, quality_csv_text(rows))
    return path


def quality_csv_text(rows: list[Mapping]) -> str:
    """Quality rows as CSV text: the contract columns first, lists joined by ``;``."""
    import csv
    import io

    columns = list(QUALITY_FIRST_COLUMNS)
    for row in rows:
        columns.extend(k for k in row if k not in columns)
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([_csv_cell(row.get(c)) for c in columns])
    return buffer.getvalue()


def read_quality_csv(path) -> list[dict]:
    """Read ``quality.csv`` back (numbers as float, flags as lists)."""
    import csv

    path = Path(path)
    if not path.is_file():
        return []
    with open(path, encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    out = []
    for row in rows:
        parsed = {}
        for key, value in row.items():
            if key == "flags":
                parsed[key] = [f for f in (value or "").split(";") if f]
            elif key in ("roi", "channel", "label", "stage", "ghost_sources",
                         "striped_rows", "striped_columns"):
                parsed[key] = value
            else:
                parsed[key] = _parse_number(value)
        out.append(parsed)
    return out


def _parse_number(text):
    if text is None or text == "":
        return None
    try:
        return float(text)
    except ValueError:
        return text


def _csv_cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, (list, tuple)):
        return ";".join(str(v) for v in value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)

