"""A run's sample sheet: each ROI's batch and further columns, and the spillover matrix per batch.

:func:`check_samples` reads the sheet (``--samples`` or ``samples.csv`` in the cohort),
matches it with the cohort's ROIs and reads the matrices named per batch, by the sheet's
``spillover`` column or by the recipe's ``[compensation.batches]`` table, writing nothing. :func:`write_sample_files` writes the run's copies: ``samples.csv``
(``roi,batch,...``, one row per ROI id) and ``spillover-batch-<batch>.csv`` per batch with
its own matrix, so the run folder stays self-contained. The plan then gives each ROI's job
its batch's matrix (:func:`job_spillover`); the ledger records which one (its SHA-256).
"""

from __future__ import annotations

import dataclasses
import hashlib
import re
from collections.abc import Mapping
from pathlib import Path

from ..errors import InputError
from ..files import interval_paths, remove_path, write_atomic, written_by_plexwash
from ..table import SAMPLES_COPY

#: Copies of per-batch spillover matrices in a run folder: ``spillover-batch-<batch>.csv``.
BATCH_SPILLOVER_PREFIX = "spillover-batch-"


@dataclasses.dataclass(frozen=True)
class SampleInputs:
    """A run's sample sheet, read and checked; nothing written yet.

    Attributes
    ----------
    sheet : Path
        The sheet read.
    columns : tuple of str
        ``batch`` then the further columns.
    rows : mapping
        ROI id -> {column: value}.
    matrices : mapping
        Batch -> its spillover matrix (only with compensation on and a ``spillover`` column).
    copies : mapping
        Batch -> file name of the matrix's copy in the run folder.
    sources : tuple of Path
        The matrices the sheet names (inputs of the run, guarded).
    origins : mapping
        Batch -> the file its matrix was read from (the sheet's or the recipe's).
    """

    sheet: Path
    columns: tuple[str, ...]
    rows: Mapping[str, dict]
    matrices: Mapping[str, object]
    copies: Mapping[str, str]
    sources: tuple[Path, ...] = ()
    origins: Mapping[str, Path] = dataclasses.field(default_factory=dict)

    def inputs(self) -> list[Path]:
        """The files the sheet brings into the run (guarded against being written over)."""
        return [self.sheet, *self.sources]

    def outputs(self) -> list[str]:
        """Names this sheet adds to the run folder."""
        names = [SAMPLES_COPY]
        for name in self.copies.values():
            names += [name, *(p.name for p in interval_paths(name))]
        return names


def check_samples(cohort_dir: Path, rois, samples, recipe) -> SampleInputs | None:
    """Read, match and check a run's sample sheet (None when the run has none).

    With compensation on, each batch's matrix comes from the sheet's ``spillover`` column
    or the recipe's ``[compensation.batches]``; the recipe naming a batch no ROI has (or
    a run without a sheet), or a matrix other than the sheet's for the same batch, is an
    :class:`~plexwash.qc.errors.InputError` naming the recipe.
    """
    from ..io import find_samples, match_samples

    named = recipe.batch_spillover_paths() if recipe.compensation.enabled else {}
    where = recipe.source or "recipe"
    sheet = find_samples(cohort_dir, samples)
    if sheet is None:
        if named:
            raise InputError(where, f"[compensation.batches] names batch(es) {', '.join(sorted(named))} "
                             "but the run has no sample sheet (samples.csv) saying which ROI is in which batch")
        return None
    rows = match_samples(sheet, rois, cohort_dir)
    used = {row["batch"] for row in rows.values()}
    unknown = sorted(set(named) - used)
    if unknown:
        raise InputError(where, f"[compensation.batches] names batch {unknown[0]!r}, which no ROI of the "
                         f"sample sheet {sheet.path.name} has (its batches: {', '.join(sorted(used))})")
    origins = {b: p for b, p in sheet.spillover.items() if b in used} if recipe.compensation.enabled else {}
    for batch, path in named.items():
        if batch in origins and not _same_matrix_file(origins[batch], path):
            raise InputError(where, f"[compensation.batches] gives batch {batch!r} {path.name}, but the "
                             f"sample sheet {sheet.path} gives it {origins[batch].name}; name one")
        origins.setdefault(batch, path)
    matrices: dict[str, object] = {}
    if origins:
        from ..spillover import read_spillover

        matrices = {batch: read_spillover(origins[batch]) for batch in sorted(origins)}
    return SampleInputs(sheet=sheet.path, columns=sheet.columns, rows=rows, matrices=matrices,
                        copies=_copy_names(matrices),
                        sources=tuple(dict.fromkeys([*sheet.spillover.values(), *named.values()])),
                        origins=origins)


def _same_matrix_file(first: Path, second: Path) -> bool:
    """True when two paths name one file, or two files with the same bytes."""
    try:
        if first.resolve() == second.resolve() or first.samefile(second):
            return True
        return first.read_bytes() == second.read_bytes()
    except OSError:
        return False


def with_matrix_column(samples: SampleInputs | None, default: str) -> SampleInputs | None:
    """The sheet with a ``spillover`` column: the run folder's matrix file each ROI used.

    Added only when some batch has its own matrix (``default``: the run-wide copy's name,
    empty without one), so ``quality.csv``, the ledger's ``sample`` and the report say
    which matrix compensated each ROI.
    """
    from ..io.samples import SPILLOVER_COLUMN

    if samples is None or not samples.copies:
        return samples
    rows = {rid: {**row, SPILLOVER_COLUMN: samples.copies.get(row.get("batch"), default)}
            for rid, row in samples.rows.items()}
    return dataclasses.replace(samples, rows=rows, columns=(*samples.columns, SPILLOVER_COLUMN))


def _copy_names(matrices: Mapping[str, object]) -> dict[str, str]:
    """A file name per batch, safe on every file system and distinct even when slugs clash."""
    names: dict[str, str] = {}
    for batch in matrices:
        slug = re.sub(r"[^A-Za-z0-9._-]+", "_", batch).strip("._") or "batch"
        name = f"{BATCH_SPILLOVER_PREFIX}{slug}.csv"
        if name in names.values() or slug != batch:
            name = f"{BATCH_SPILLOVER_PREFIX}{slug}-{hashlib.sha256(batch.encode()).hexdigest()[:8]}.csv"
        names[batch] = name
    return names


def write_sample_files(out: Path, samples: SampleInputs | None) -> dict[str, tuple[Path, str]]:
    """Write the run's sample sheet copy and per-batch matrices; batch -> (matrix copy, sha256)."""
    if samples is None:  # a sheet dropped since the last run: its copy no longer speaks
        if written_by_plexwash(out / SAMPLES_COPY):
            remove_path(out / SAMPLES_COPY)
        return {}
    from ..io import sha256_path
    from ..spillover import write_spillover

    text = samples_csv_text(samples.columns, samples.rows)
    target = out / SAMPLES_COPY
    if not target.is_file() or target.read_text(encoding="utf-8") != text:
        write_atomic(target, text)
    copies = {}
    for batch, matrix in samples.matrices.items():
        path = write_spillover(out / samples.copies[batch], matrix)
        copies[batch] = (path, sha256_path(path))
    return copies


def samples_csv_text(columns, rows: Mapping[str, Mapping]) -> str:
    """The run's copy of the sheet: ``roi`` then the sheet's columns, one row per ROI id."""
    import csv
    import io

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["roi", *columns])
    for rid in sorted(rows):
        writer.writerow([rid, *(rows[rid].get(c, "") for c in columns)])
    return buffer.getvalue()


def job_spillover(batch_spillover: Mapping[str, tuple[Path, str]], sample: Mapping | None,
                  default: tuple[Path | None, str | None]) -> tuple[Path | None, str | None]:
    """The matrix (copy, sha256) an ROI of this sample uses: its batch's, else the run's."""
    batch = (sample or {}).get("batch")
    return batch_spillover.get(batch, default) if batch is not None else default
