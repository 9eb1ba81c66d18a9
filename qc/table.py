"""The run's quality table, ``quality.csv``: rows from the ledger, cohort outliers, CSV.

One row per ROI x channel x stage (``raw`` / ``washed``), rebuilt from each ROI's latest
``done`` ledger record at the end of every run; the report reads it back. Neither the
run nor the report is imported here, so both can use it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

from .files import csv_text, read_csv_dicts, write_atomic
from .ledger import QUALITY, latest_records, read_ledger

#: A run folder's copy of its sample sheet: ``roi,batch,...`` (written by the run).
SAMPLES_COPY = "samples.csv"
#: The batch test of a run with a sample sheet: one row per channel x stage x metric.
BATCHES = "batches.csv"
BATCH_COLUMNS = ("channel", "stage", "metric", "batches", "rois", "h", "p", "fold", "high", "low",
                 "differs", "medians")

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
    each step's removed fraction. With a sample sheet every row carries the ROI's
    ``batch`` and further columns, and ``batch-outlier`` is judged within each batch the
    same way (``sbr_batch_modified_z``).
    """
    from .quality import add_batch_outlier_flags, add_outlier_flags

    samples = read_samples_copy(out_dir)
    latest = latest_records(read_ledger(out_dir))
    rows = []
    for name in sorted(latest):
        record = latest.get(name)
        if record is None or record.get("status") != "done":
            continue
        removed = record.get("removed_fraction") or {}
        sample = samples.get(name, {})  # the run's sheet copy (records keep the one they ran with)
        for row in record.get("quality", []):
            row = {**{k: v for k, v in sample.items() if k not in row}, **row}
            row["roi"] = name  # the ROI's id (its path in the cohort)
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
    if any(row.get("batch") not in (None, "") for row in flagged):
        flagged = add_batch_outlier_flags(flagged, metric=OUTLIER_METRIC, cutoff=OUTLIER_CUTOFF,
                                          min_rois=OUTLIER_MIN_ROIS)
    return flagged


def read_samples_copy(out_dir) -> dict[str, dict]:
    """A run folder's sample sheet copy: ROI id -> {batch, further columns} (empty without)."""
    import csv

    path = Path(out_dir) / SAMPLES_COPY
    if not path.is_file():
        return {}
    with open(path, encoding="utf-8", newline="") as fh:
        return {row.pop("roi"): row for row in csv.DictReader(fh) if row.get("roi")}


def batch_table(rows: list[Mapping], quality=None) -> list[dict]:
    """The batch test of every channel, raw and washed (:func:`~plexwash.qc.quality.batch_differences`).

    ``quality`` is the recipe's ``[quality]`` settings (thresholds ``batch_alpha`` and
    ``batch_fold``); the defaults apply without one. Empty without batches.
    """
    from .quality import QualitySettings, batch_differences

    quality = quality or QualitySettings()
    if not any(row.get("batch") not in (None, "") for row in rows):
        return []
    return [d for stage in ("raw", "washed")
            for d in batch_differences(rows, alpha=quality.batch_alpha, fold=quality.batch_fold,
                                       stage=stage)]


def batch_csv_text(table: list[Mapping]) -> str:
    """The batch table as CSV (``medians`` as ``batch:value`` joined by ``;``)."""
    return csv_text(BATCH_COLUMNS, [dict(row, medians=[f"{b}:{v:.6g}" for b, v in row["medians"].items()])
                                    for row in table])


def write_quality_table(out_dir) -> Path:
    """Write ``quality.csv`` of a run folder from its ledger, atomically."""
    rows = quality_table(out_dir)
    path = Path(out_dir) / QUALITY
    write_atomic(path, quality_csv_text(rows))
    batches = batch_table(rows, _run_quality_settings(out_dir))
    if batches or (Path(out_dir) / BATCHES).is_file():
        write_atomic(Path(out_dir) / BATCHES, batch_csv_text(batches))
    return path


def _run_quality_settings(out_dir):
    """The run's ``[quality]`` settings (from its recipe copy), or None for the defaults."""
    from .errors import InputError
    from .ledger import RECIPE

    recipe = Path(out_dir) / RECIPE
    if not recipe.is_file():
        return None
    from .recipe import load_recipe

    try:
        return load_recipe(recipe).quality
    except InputError:
        return None


def quality_csv_text(rows: list[Mapping]) -> str:
    """Quality rows as CSV text: the contract columns first, lists joined by ``;``."""
    columns = list(QUALITY_FIRST_COLUMNS)
    for row in rows:
        columns.extend(k for k in row if k not in columns)
    return csv_text(columns, rows)


def read_quality_csv(path) -> list[dict]:
    """Read ``quality.csv`` back (numbers as float, flags as lists)."""
    rows = read_csv_dicts(path)
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


