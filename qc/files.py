"""Writing outputs safely: one atomic writer, one temporary-name pattern, one sweeper, one guard.

Every file or folder plexwash writes goes through :func:`write_atomic`: it is built under
a hidden temporary name beside its destination (``.NAME.partial-<pid>-<random>``), fsynced,
marked as plexwash's own, and renamed onto its final name; a failure removes the temporary.
The other temporary names (staging ``.NAME.spill-*``, a replaced folder ``.NAME.old-*``, a
quality-only stack ``.NAME.measure-*``, a writability probe ``.NAME.probe-*``) follow the
same pattern ``.NAME.<kind>-<token>``, so :func:`sweep_leftovers` finds every one of them.

:func:`check_output` is the rule every command applies before it writes: an output may
never be, contain, or sit inside any input of the command (including files reached
through the inputs: controls listed in a controls CSV, the ROIs of a run's ledger, a
recipe's spillover matrix), it must carry the extension of its kind, and an existing
output is replaced only when plexwash wrote it (:func:`written_by_plexwash`).

A full disk ends as :class:`~plexwash.qc.errors.OutputError` naming the file being written
("no space left on device"), never as a raw ``OSError``.
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import secrets
import shutil
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path

from .errors import InputError, OutputError

#: Kinds of temporary name; every one is ``.NAME.<kind>-<token>``.
TEMPORARY_KINDS = ("partial", "spill", "old", "measure", "probe")
_TEMPORARY = re.compile(r"^\.(?P<name>.+)\.(?P<kind>" + "|".join(TEMPORARY_KINDS)
                        + r")-(?P<token>[A-Za-z0-9_]+(?:-[A-Za-z0-9_]+)?)$")
#: Extended attribute set on everything plexwash writes (where the file system keeps them).
MARK_ATTRIBUTE = "user.plexwash"
#: The extensions of each kind of output.
EXTENSIONS = {
    "html": (".html", ".htm"),
    "csv": (".csv",),
    "png": (".png",),
    "toml": (".toml",),
    "stack": (".ome.tiff", ".ome.tif", ".tiff", ".tif", ".ome.zarr", ".zarr"),
}
_DISK_FULL = (errno.ENOSPC, errno.EDQUOT)


# --------------------------------------------------------------------------- temporary names


def temporary_path(final: str | Path, kind: str = "partial") -> Path:
    """A fresh hidden temporary name beside ``final`` (``.NAME.<kind>-<pid>-<random>``).

    Examples
    --------
    >>> p = temporary_path("out/roi.ome.tiff")
    >>> p.parent.name, p.name.startswith(".roi.ome.tiff.partial-"), is_temporary(p)
    ('out', True, True)
    """
    if kind not in TEMPORARY_KINDS:
        raise ValueError(f"unknown temporary kind {kind!r}")
    final = Path(final)
    return final.with_name(f".{final.name}.{kind}-{os.getpid()}-{secrets.token_hex(4)}")


def is_temporary(path: str | Path) -> bool:
    """True for a name made by :func:`temporary_path` (or a staging folder ``.NAME.spill-*``)."""
    return _TEMPORARY.match(Path(path).name) is not None


def sweep_leftovers(folder, *, only_dead: bool = False) -> list[Path]:
    """Remove the temporary files and folders that interrupted writers left in ``folder``.

    Only names of the pattern ``.NAME.<kind>-<token>`` are touched. With ``only_dead``
    only those whose token starts with the id of a process that no longer runs (safe
    while other plexwash processes may be writing into the folder); otherwise every one
    (call it only while no writer is active, e.g. under a run's lock).

    Returns
    -------
    list of Path
        What was removed.
    """
    folder = Path(folder)
    removed: list[Path] = []
    if not folder.is_dir():
        return removed
    for item in folder.iterdir():
        match = _TEMPORARY.match(item.name)
        if match is None:
            continue
        if only_dead:
            pid = match["token"].split("-")[0]
            if not pid.isdigit() or _alive(int(pid)):
                continue
        remove_path(item)
        removed.append(item)
    return removed


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_path(path: str | Path) -> None:
    """Remove a file or a folder tree; a missing one is fine."""
    path = Path(path)
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


# --------------------------------------------------------------------------- writing


def output_error(exc: OSError, path: str | Path) -> Exception:
    """The error to raise for an ``OSError`` met while writing ``path``.

    A full disk (or quota) becomes :class:`OutputError` naming the file; anything else is
    returned unchanged.
    """
    if isinstance(exc, OSError) and exc.errno in _DISK_FULL:
        return OutputError(path, "no space left on device")
    return exc


def write_atomic(path: str | Path, content: bytes | str | Callable[[Path], None]) -> Path:
    """Write a file (bytes or text) or build a file or folder (a callable) atomically.

    The content goes to :func:`temporary_path` beside ``path``, is fsynced, marked as
    plexwash's, then renamed onto ``path``. On any failure the temporary is removed and a
    full disk is raised as :class:`OutputError` naming ``path``. The new file gets the
    permissions of the umask, like any other file the user creates.

    Parameters
    ----------
    path : str or Path
        The destination.
    content : bytes, str or callable
        The bytes (text is written as UTF-8), or a function that writes the temporary
        path it is given (a file or a folder).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.csv"
    >>> _ = write_atomic(p, "x,y\\n")
    >>> p.read_text(), [q.name for q in p.parent.iterdir()]
    ('x,y\\n', ['a.csv'])
    """
    path = Path(path)
    tmp = temporary_path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        if callable(content):
            content(tmp)
        else:
            data = content.encode("utf-8") if isinstance(content, str) else bytes(content)
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
        if tmp.is_file():
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        mark_written(tmp)
        replace(tmp, path)
    except OSError as exc:
        raise output_error(exc, path) from None
    finally:
        if tmp.exists() or tmp.is_symlink():
            remove_path(tmp)
    return path


def mark_written(path: str | Path) -> None:
    """Mark a file or folder as written by plexwash (an extended attribute, where kept)."""
    with contextlib.suppress(OSError, AttributeError):
        os.setxattr(path, MARK_ATTRIBUTE, b"1", follow_symlinks=False)


def replace(tmp: Path, final: Path) -> None:
    """Move a finished temporary file or folder onto its final name.

    An existing folder is replaced only when plexwash wrote it; it is first renamed away
    (``.NAME.old-*``) so the final name never holds half of either.
    """
    if final.is_dir() and not final.is_symlink():
        if not written_by_plexwash(final):
            raise InputError(final, "exists and was not written by plexwash; refusing to replace it")
        old = temporary_path(final, "old")
        os.replace(final, old)
        os.replace(tmp, final)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, final)
    fsync_dir(final.parent)


def fsync_dir(folder: Path) -> None:
    """Flush a folder's entries (a rename) to disk; a no-op where folders cannot be opened."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def interval_paths(path: str | Path) -> tuple[Path, Path]:
    """The files holding the lower and upper interval bounds of a spillover CSV.

    Examples
    --------
    >>> [p.name for p in interval_paths("runs/spill.csv")]
    ['spill.low.csv', 'spill.high.csv']
    """
    path = Path(path)
    stem = path.name[: -len(".csv")] if path.name.lower().endswith(".csv") else path.name
    return path.with_name(stem + ".low.csv"), path.with_name(stem + ".high.csv")


# --------------------------------------------------------------------------- ownership


def written_by_plexwash(path: str | Path) -> bool:
    """True when an existing file or folder was written by plexwash.

    Recognised by plexwash's extended attribute, or by the metadata its writers put in
    the file: the TIFF ``Software`` tag, the ``plexwash`` attribute of an OME-Zarr group,
    the recipe's first comment line, the report's ``generator`` meta tag, the PNG
    ``Software`` text, or for a CSV, text identical to what plexwash writes for it.
    """
    path = Path(path)
    if path.is_symlink():
        return False
    try:
        if MARK_ATTRIBUTE in os.listxattr(path):
            return True
    except (OSError, AttributeError):
        pass
    name = path.name.lower()
    try:
        if path.is_dir():
            return _zarr_is_ours(path)
        if not path.is_file():
            return False
        if name.endswith((".tif", ".tiff")):
            return _tiff_is_ours(path)
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError:
        return False
    if name.endswith(".toml"):
        return head.startswith(b"# plexwash recipe")
    if name.endswith((".html", ".htm")):
        return b'<meta name="generator" content="plexwash' in head
    if name.endswith(".png"):
        return b"Software\x00plexwash" in head
    if name.endswith(".csv"):
        return _csv_is_ours(path)
    return False


def _tiff_is_ours(path: Path) -> bool:
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            software = tif.pages.first.software or ""
    except Exception:
        return False
    return str(software).startswith("plexwash")


def _zarr_is_ours(path: Path) -> bool:
    import json

    for meta in ("zarr.json", ".zattrs"):
        try:
            doc = json.loads((path / meta).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        attrs = doc.get("attributes", doc) if meta == "zarr.json" else doc
        if isinstance(attrs, dict) and "plexwash" in attrs:
            return True
    return False


def _csv_is_ours(path: Path) -> bool:
    """A CSV laid out exactly as plexwash writes one: a spillover matrix (or its interval
    bounds), a quality table, an audit table or a run's stains copy."""
    import csv

    try:
        rows = list(csv.reader(path.read_text(encoding="utf-8").splitlines()))
    except (OSError, UnicodeDecodeError):
        return False
    if not rows:
        return False
    header = rows[0]
    if header == ["tag", "marker", "wash"]:
        return all(len(r) == 3 and r[2] in ("yes", "no") for r in rows[1:])
    if (header[:4] in (["roi", "channel", "label", "stage"], ["roi", "first", "second", "stage"])
            or header[:2] == ["roi", "batch"]
            or header[:3] == ["channel", "stage", "metric"]):  # quality, audit, sample sheet copy, batches
        return all(len(r) == len(header) for r in rows[1:])
    if header == ["source", "receiver", "reason", "estimate", "low", "high", "p_value", "source_level"]:
        return all(len(r) == len(header) for r in rows[1:])  # a tissue estimate's not-identifiable list
    if header[:1] != [""] or len(rows) != len(header) or [r[0] for r in rows[1:]] != header[1:]:
        return False
    try:
        [float(v) for r in rows[1:] for v in r[1:]]
    except ValueError:
        return False
    return all(len(r) == len(header) for r in rows[1:])


# --------------------------------------------------------------------------- the guard


def check_output(out: str | Path, inputs: Iterable[str | Path] = (), *, kind: str | None = None,
                 may_exist: bool = True) -> Path:
    """Refuse an output that would touch an input, has the wrong extension, or is not ours.

    Parameters
    ----------
    out : str or Path
        The file or folder to be written.
    inputs : iterable of path
        Every input of the command, files reached through them included (see
        :func:`reached_inputs`).
    kind : str, optional
        A key of :data:`EXTENSIONS`: the output must end in one of its extensions.
    may_exist : bool
        False: an existing output is refused even when plexwash wrote it.

    Returns
    -------
    Path
        ``out``; nothing is created.

    Raises
    ------
    InputError
        Naming ``out``: it is, holds or lies inside an input; wrong extension; exists and
        was not written by plexwash; its folder is not a folder or not writable.
    """
    out = Path(out)
    if kind is not None and not out.name.lower().endswith(EXTENSIONS[kind]):
        raise InputError(out, f"a {kind} output must end in {' or '.join(EXTENSIONS[kind])}")
    refuse_overlap(out, inputs)
    if os.path.lexists(out):
        if not may_exist:
            raise InputError(out, "already exists; choose another name")
        if not written_by_plexwash(out):
            raise InputError(out, "exists and was not written by plexwash; refusing to replace it "
                             "(remove it yourself or choose another name)")
    _check_writable_folder(out)
    return out


def refuse_overlap(out: str | Path, inputs: Iterable[str | Path], *, may_hold: bool = False) -> None:
    """Refuse an output that is an input (also through a link), lies inside one or holds one.

    ``may_hold``: a folder that only receives new files (a run folder) may hold inputs.
    """
    out = Path(out)
    real_out = os.path.realpath(out)
    out_stat = _stat(out)
    for item in inputs:
        item = Path(item)
        real = os.path.realpath(item)
        item_stat = _stat(item)
        if real == real_out or (out_stat and item_stat and os.path.samestat(out_stat, item_stat)):
            raise InputError(out, f"output is an input ({item}); refusing to overwrite it")
        if _inside(real_out, real):
            raise InputError(out, f"output would lie inside the input {item}; refusing to write into it")
        if not may_hold and _inside(real, real_out):
            raise InputError(out, f"output would replace a folder holding the input {item}; refusing")


def check_output_folder(folder: str | Path, inputs: Iterable[str | Path], names: Iterable[str], *,
                        ours: Iterable[str] = ()) -> Path:
    """Check a folder that receives the outputs ``names`` (a run folder); nothing is created.

    The folder may not be or lie inside an input, nor hold an input folder; none of the
    files it receives may be an input; each that exists must be plexwash's (``ours``
    names those known to be, e.g. from the folder's ledger).
    """
    folder = Path(folder)
    inputs = list(inputs)
    refuse_overlap(folder, inputs, may_hold=True)
    for item in inputs:
        if Path(item).is_dir() and _inside(os.path.realpath(item), os.path.realpath(folder)):
            raise InputError(folder, f"output folder holds the input folder {item}; choose another")
    ours = set(ours)
    for name in names:
        path = folder / name
        refuse_overlap(path, inputs)
        if os.path.lexists(path) and name not in ours and not written_by_plexwash(path):
            raise InputError(path, "exists and was not written by plexwash; refusing to replace it "
                             "(remove it yourself or choose another output folder)")
    _check_writable_folder(folder / ".plexwash")
    return folder


def _stat(path: Path):
    try:
        return os.stat(path)
    except OSError:
        return None


def _inside(child: str, parent: str) -> bool:
    return child != parent and child.startswith(parent.rstrip(os.sep) + os.sep)


def _check_writable_folder(out: Path) -> None:
    parent = out.parent if str(out.parent) else Path(".")
    existing = parent
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    if not existing.is_dir():
        raise InputError(out, f"output folder {existing} is not a folder")
    try:  # os.access says yes to root even where writing fails: really try
        fd, probe = tempfile.mkstemp(prefix=f".{out.name}.probe-{os.getpid()}-", dir=existing)
    except OSError as exc:
        if exc.errno in _DISK_FULL:
            raise OutputError(out, "no space left on device") from None
        raise InputError(out, f"output folder {existing} is not writable ({exc.strerror})") from None
    os.close(fd)
    os.unlink(probe)


def reached_inputs(paths: Iterable[str | Path | None]) -> list[Path]:
    """The given input paths plus the files reached through each, by its kind.

    A controls CSV adds its control files; a run folder (or its ledger) adds the ROIs its
    ledger lists; a spillover CSV adds its interval files. (A recipe's spillover matrix
    is named by the recipe: give it too.) Paths that do not exist are kept (they cannot be overwritten either).
    """
    out: list[Path] = []
    for path in paths:
        if path is None:
            continue
        path = Path(path)
        out.append(path)
        name = path.name.lower()
        if path.is_dir() and (path / "ledger.jsonl").is_file():
            out.extend(_ledger_inputs(path / "ledger.jsonl"))
        elif name.endswith(".csv") and path.is_file():
            out.extend(p for p in interval_paths(path) if p.exists())
            out.extend(_controls_files(path))
    return out


def _ledger_inputs(ledger: Path) -> list[Path]:
    import json

    found = []
    with contextlib.suppress(OSError), open(ledger, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            with contextlib.suppress(ValueError):
                record = json.loads(line)
                if isinstance(record, dict) and record.get("input"):
                    found.append(Path(record["input"]))
    return list(dict.fromkeys(found))


def _controls_files(path: Path) -> list[Path]:
    """The files a controls CSV (``file,channel``) or a sample sheet (``file,batch[,spillover]``)
    lists; nothing for another CSV."""
    import csv

    try:
        rows = list(csv.reader(path.read_text(encoding="utf-8-sig").splitlines()))
    except (OSError, UnicodeDecodeError):
        return []
    if not rows:
        return []
    header = [c.strip().lower() for c in rows[0]]
    if "file" not in header:
        return []
    columns = [header.index(c) for c in ("file", "spillover") if c in header]
    found = []
    for row in rows[1:]:
        for column in columns:
            if len(row) > column and row[column].strip():
                name = Path(row[column].strip())
                found.append(name if name.is_absolute() else path.parent / name)
    return list(dict.fromkeys(found))


def read_csv_dicts(path) -> list[dict]:
    """The rows of a CSV file written by plexwash as dicts of text (``[]`` when it is missing)."""
    import csv

    path = Path(path)
    if not path.is_file():
        return []
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def csv_text(columns, rows) -> str:
    """Rows (mappings) as CSV text under ``columns``: None and non-finite floats empty,
    lists joined by ``;``, booleans ``true``/``false``, floats in full (``repr``)."""
    import csv
    import io

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    cell = _csv_cell_fast
    for row in rows:
        get = row.get
        writer.writerow([cell(get(c)) for c in columns])
    return buffer.getvalue()


def _csv_cell_fast(value, _repr=repr, _float=float, _str=str) -> str:
    """:func:`_csv_cell` with the cells of a quality table first (plain floats, text, None):
    a quality.csv has about 70 cells per row and a row per ROI and channel. The same text."""
    kind = type(value)
    if kind is _float:
        return _repr(value) if value - value == 0.0 else ""  # 0.0 for finite values only
    if kind is _str:
        return value
    if value is None:
        return ""
    return _csv_cell(value)


def _csv_cell(value) -> str:
    import math

    if value is None:
        return ""
    if isinstance(value, (list, tuple)):
        return ";".join(str(v) for v in value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)
