"""The run's ledger: ``ledger.jsonl``, one JSON record per line and ROI attempt.

Also the names of a run folder's files, so that the run (:mod:`plexwash.qc.run`), which
writes them, and the report (:mod:`plexwash.qc.report`), which reads them, share them
without importing each other.

Appends are fsynced one line at a time and never leave half a record (a failed write is
cut back); a line torn by a killed process is skipped by readers and dropped by
:func:`repair_ledger` when the next run starts.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping
from pathlib import Path

from .files import mark_written, output_error, write_atomic

#: The files of a run folder besides the washed stacks (see :mod:`plexwash.qc.run`).
LEDGER = "ledger.jsonl"
QUALITY = "quality.csv"
REPORT = "report.html"
RECIPE = "recipe.toml"
SPILLOVER_COPY = "spillover.csv"
STAINS_COPY = "stains.csv"
RUN_LOG = "run.log"
#: Held by a run while it writes; its presence also marks a folder a run wrote.
RUN_LOCK = ".plexwash-run.lock"


class Ledger:
    """Append-only ``ledger.jsonl``: one JSON object per line, each append fsynced.

    A line torn by a killed process (no final newline) is closed off before the next
    append, and readers skip it.
    """

    def __init__(self, path):
        self.path = Path(path)

    def append(self, record: Mapping) -> None:
        line = json.dumps(json_ready(dict(record)), ensure_ascii=True, allow_nan=False) + "\n"
        try:
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o666)
            try:
                mark_written(self.path)
                if _ends_torn(self.path):
                    line = "\n" + line
                size = os.fstat(fd).st_size
                data = line.encode()
                try:
                    while data:  # a nearly full disk may take only part of the line
                        data = data[os.write(fd, data):]
                    os.fsync(fd)
                except OSError:
                    os.ftruncate(fd, size)  # no half record: the ledger stays as it was
                    raise
            finally:
                os.close(fd)
        except OSError as exc:
            raise output_error(exc, self.path) from None


def repair_ledger(path) -> bool:
    """Rewrite a ledger atomically without lines that are not complete records.

    A process killed while appending leaves a torn last line (tools such as ``jq`` stop
    there); every complete record is kept, in order. Returns True when a line was dropped.
    """
    path = Path(path)
    if not path.is_file():
        return False
    lines = path.read_bytes().splitlines(keepends=True)
    keep = [line for line in lines if line.endswith(b"\n") and _is_record(line)]
    if len(keep) == len(lines):
        return False
    write_atomic(path, b"".join(keep))
    return True


def _is_record(line: bytes) -> bool:
    try:
        record = json.loads(line)
    except (ValueError, UnicodeDecodeError):
        return False
    # an ROI record, or a run event without an ROI (the composites' percentiles)
    return isinstance(record, dict) and ("roi" in record or "event" in record)


def _ends_torn(path: Path) -> bool:
    try:
        with open(path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            if fh.tell() == 0:
                return False
            fh.seek(-1, os.SEEK_END)
            return fh.read(1) != b"\n"
    except FileNotFoundError:
        return False


def read_ledger(out_dir) -> list[dict]:
    """Every complete record of a run folder's ledger, in order (torn lines skipped).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> tmp = pathlib.Path(tempfile.mkdtemp())
    >>> Ledger(tmp / "ledger.jsonl").append({"roi": "a", "status": "done"})
    >>> [r["roi"] for r in read_ledger(tmp)]
    ['a']
    """
    path = Path(out_dir) / LEDGER
    if not path.is_file():
        return []
    records = []
    with open(path, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            if not line.endswith("\n"):
                break  # torn last line
            try:
                record = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(record, dict) and "roi" in record:
                records.append(record)
    return records


def latest_records(records: Iterable[Mapping]) -> dict[str, dict]:
    """The last record of each ROI (later attempts supersede earlier ones)."""
    out: dict[str, dict] = {}
    for record in records:
        out[record["roi"]] = dict(record)
    return out



def json_ready(value):
    """Plain JSON values: numpy numbers to Python, non-finite floats to None.

    Examples
    --------
    >>> import numpy as np
    >>> json_ready({1: (np.float32(0.5), np.nan, np.int64(3), np.array([True]))})
    {'1': [0.5, None, 3, [True]]}
    """
    kind = type(value)
    if kind is str or kind is int or kind is bool or value is None:  # most values: as they are
        return value
    if kind is float:
        return value if math.isfinite(value) else None
    if kind is dict:
        return {k if type(k) is str else str(k): json_ready(v) for k, v in value.items()}
    if kind is list or kind is tuple:
        return [json_ready(v) for v in value]
    return _json_other(value)


def _json_other(value):
    """:func:`json_ready` of a value of any other type (numpy values, mappings, paths)."""
    import numpy as np

    if isinstance(value, Mapping):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_ready(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, Path):
        return str(value)
    return value
