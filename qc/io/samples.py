"""The sample sheet ``samples.csv``: which batch (and patient, slide, date...) each ROI belongs to.

One row per ROI: ``file,batch`` and any further columns. ``file`` is the ROI's path
relative to the cohort folder (``slide03/r07.ome.tiff``; the ROI id ``slide03/r07`` is
accepted too). Every further column is carried into the ledger, ``quality.csv`` and the
report. An optional ``spillover`` column names a spillover matrix CSV for the row's batch
(relative to the sheet), for cohorts whose controls were acquired batch by batch.

:func:`read_samples` reads and checks the sheet on its own; :func:`match_samples` matches
it with a cohort's ROIs. Every problem is a one-line :class:`~plexwash.qc.errors.InputError`
naming the sheet and the line.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from pathlib import Path, PurePosixPath

from ..errors import InputError
from .cohort import roi_id
from .stains import read_csv_cells

#: The sheet's file name in a cohort folder (used when no ``--samples`` is given).
SAMPLES_NAME = "samples.csv"
#: Columns every sample sheet has.
SAMPLE_COLUMNS = ("file", "batch")
#: Optional column naming a spillover matrix per batch.
SPILLOVER_COLUMN = "spillover"
#: Column names the quality table already uses: a sheet may not shadow them.
RESERVED = ("roi", "channel", "label", "stage", "sbr", "snr", "flags")


@dataclasses.dataclass(frozen=True)
class SampleSheet:
    """A checked sample sheet.

    Attributes
    ----------
    path : Path
        The sheet.
    columns : tuple of str
        Its columns after ``file`` (``batch`` first, then the others in sheet order;
        ``spillover`` is not among them).
    rows : tuple of (int, str, dict)
        ``(line, file, {column: value})`` for each row, ``file`` normalised to POSIX
        separators without a leading ``./``.
    spillover : mapping
        Batch -> spillover matrix path (resolved against the sheet), for the batches
        whose rows name one.
    """

    path: Path
    columns: tuple[str, ...]
    rows: tuple[tuple[int, str, dict], ...]
    spillover: Mapping[str, Path]


def read_samples(path: str | Path) -> SampleSheet:
    """Read and check a sample sheet (``file,batch[,...]``).

    Raises
    ------
    InputError
        Missing file or columns, a duplicated column, a row with too many cells or an empty
        ``file`` or ``batch``, two rows for the same file, a batch given two different
        spillover matrices; each names the sheet and the line.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> sheet = pathlib.Path(tempfile.mkdtemp()) / "samples.csv"
    >>> _ = sheet.write_text("file,batch,patient\\nslide1/a.ome.tiff,B1,P7\\n")
    >>> s = read_samples(sheet)
    >>> s.columns, s.rows[0][1], s.rows[0][2]["patient"]
    (('batch', 'patient'), 'slide1/a.ome.tiff', 'P7')
    """
    path = Path(path)
    if path.is_dir():
        raise InputError(path, "is a folder; give the sample sheet (samples.csv)")
    cells = read_csv_cells(path)
    header_line, header = cells[0]
    header = [h.strip() for h in header]
    where = f"{path}: line {header_line}"
    missing = [c for c in SAMPLE_COLUMNS if c not in header]
    if missing:
        raise InputError(where, f"missing column(s) {', '.join(missing)}; the header must start "
                         f"with {','.join(SAMPLE_COLUMNS)} (further columns are carried along)")
    blank = [k + 1 for k, h in enumerate(header) if not h]
    if blank:
        raise InputError(where, f"column {blank[0]} of the header has no name")
    repeated = sorted({h for h in header if header.count(h) > 1})
    if repeated:
        raise InputError(where, f"duplicate column(s) {', '.join(repeated)}")
    shadowed = [h for h in header if h in RESERVED]
    if shadowed:
        raise InputError(where, f"column(s) {', '.join(shadowed)} would shadow quality table "
                         "columns; rename them")
    if len(cells) < 2:
        raise InputError(path, "no rows below the header")
    rows, first_line, spillover, spill_line = [], {}, {}, {}
    for line, values in cells[1:]:
        where = f"{path}: line {line}"
        if len(values) > len(header) and any(v.strip() for v in values[len(header):]):
            raise InputError(where, f"{len(values)} cells, the header has {len(header)}")
        row = {h: (values[k].strip() if k < len(values) else "") for k, h in enumerate(header)}
        name = _normalise(row.pop("file"))
        if not name:
            raise InputError(where, "empty file cell")
        if not row["batch"]:
            raise InputError(where, f"{name} has no batch")
        if name in first_line:
            raise InputError(where, f"{name} is listed twice (first on line {first_line[name]})")
        first_line[name] = line
        matrix = row.pop(SPILLOVER_COLUMN, "")
        if matrix:
            resolved = Path(matrix) if Path(matrix).is_absolute() else path.parent / matrix
            batch = row["batch"]
            if batch in spillover and spillover[batch] != resolved:
                raise InputError(where, f"batch {batch} names a second spillover matrix ({matrix}); "
                                 f"line {spill_line[batch]} names {spillover[batch].name}")
            spillover.setdefault(batch, resolved)
            spill_line.setdefault(batch, line)
        rows.append((line, name, row))
    columns = tuple(["batch"] + [h for h in header if h not in ("file", "batch", SPILLOVER_COLUMN)])
    return SampleSheet(path=path, columns=columns, rows=tuple(rows), spillover=spillover)


def match_samples(sheet: SampleSheet, rois: Sequence[tuple[str, Path]], cohort_dir) -> dict[str, dict]:
    """Each ROI id's sample columns, checking that the sheet and the cohort agree.

    A row matches an ROI by its path relative to the cohort (``slide03/r07.ome.tiff``)
    or by its id (``slide03/r07``).

    Raises
    ------
    InputError
        A row naming no ROI of the cohort (its line), two rows naming the same ROI, or
        ROIs the sheet does not list (the first few named, with their count).
    """
    cohort_dir = Path(cohort_dir)
    by_name: dict[str, str] = {}
    for rid, path in rois:
        by_name[_relative(path, cohort_dir)] = rid
        by_name.setdefault(rid, rid)
    found: dict[str, dict] = {}
    line_of: dict[str, int] = {}
    for line, name, row in sheet.rows:
        rid = by_name.get(name)
        if rid is None:
            raise InputError(f"{sheet.path}: line {line}",
                             f"{name} is not an ROI of the cohort {cohort_dir}")
        if rid in found:
            raise InputError(f"{sheet.path}: line {line}",
                             f"{name} is the ROI {rid} again (first on line {line_of[rid]})")
        found[rid] = {c: row.get(c, "") for c in sheet.columns}
        line_of[rid] = line
    missing = [rid for rid, _ in rois if rid not in found]
    if missing:
        shown = ", ".join(missing[:5]) + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        raise InputError(sheet.path, f"{len(missing)} ROI(s) of the cohort not listed: {shown}")
    return found


def find_samples(cohort_dir, given=None) -> SampleSheet | None:
    """The sample sheet of a run: ``given``, else ``samples.csv`` in the cohort folder, else None."""
    if given is not None:
        return given if isinstance(given, SampleSheet) else read_samples(given)
    default = Path(cohort_dir) / SAMPLES_NAME
    return read_samples(default) if default.is_file() else None


def _normalise(name: str) -> str:
    name = name.replace("\\", "/").strip()
    while name.startswith("./"):
        name = name[2:]
    return PurePosixPath(name).as_posix() if name else ""


def _relative(path: Path, cohort_dir: Path) -> str:
    try:
        return Path(path).relative_to(cohort_dir).as_posix()
    except ValueError:
        return roi_id(path, cohort_dir)
