"""Spillover matrix files: the CSV, its interval files beside it, and the heatmap PNG.

``SPILL.csv``: first row an empty cell then the receiving channel names; each next row a
source channel name then its values. :func:`write_spillover` writes the per-entry
uncertainty of an estimate beside it in the same layout: ``SPILL.low.csv`` and
``SPILL.high.csv`` (lower and upper interval bounds), and optionally a heatmap PNG;
every file through the one atomic writer (:func:`plexwash.qc.files.write_atomic`).
:func:`read_spillover` reads the two interval files when they are there.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..files import interval_paths, write_atomic
from .matrix import SpilloverMatrix, check_spillover, refuse_duplicate_names

_VALUE_FORMAT = ".10g"


def read_spillover(path: str | Path) -> SpilloverMatrix:
    """Read and check a spillover CSV (and its interval files, when present).

    Parameters
    ----------
    path : str or Path
        The CSV: first row an empty cell then the receiving channel names; each next row
        a source channel name then its values. Rows and columns must name the same
        channels (the column order may differ from the row order).

    Returns
    -------
    SpilloverMatrix
        Channels in row order; ``low``/``high`` from ``<stem>.low.csv`` and
        ``<stem>.high.csv`` beside it, if both exist.

    Raises
    ------
    InputError
        Missing or unreadable file, bad layout, a value that is not a number, or a
        matrix that :func:`check_spillover` refuses.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "spill.csv"
    >>> _ = p.write_text(",Nd145,Nd146\\nNd145,1,0.02\\nNd146,0,1\\n")
    >>> read_spillover(p).values.tolist()
    [[1.0, 0.02], [0.0, 1.0]]
    """
    path = Path(path)
    channels, values = _read_matrix_csv(path)
    low_path, high_path = interval_paths(path)
    low = high = None
    if low_path.exists() and high_path.exists():
        low = _read_matrix_csv(low_path, channels=channels)[1]
        high = _read_matrix_csv(high_path, channels=channels)[1]
    matrix = SpilloverMatrix(channels, values, low, high)
    check_spillover(matrix, source=path)
    return matrix


def _read_matrix_csv(path: Path, *, channels: tuple[str, ...] | None = None):
    """Parse one matrix CSV; with ``channels`` given, reorder to (and require) them."""
    from ..io import read_csv_cells

    if path.is_dir():
        raise InputError(path, "is a folder, expected a spillover CSV")
    rows = read_csv_cells(path)
    header = [cell.strip() for cell in rows[0][1]]
    if header[0]:
        raise InputError(path, "the first cell must be empty (row 1 = receiving channel names)")
    receivers = header[1:]
    if not receivers or any(not name for name in receivers):
        raise InputError(path, "row 1 must name every receiving channel")
    refuse_duplicate_names(path, receivers, "column")
    sources, table = [], []
    for line, row in rows[1:]:
        if len(row) != len(header):
            raise InputError(path, f"line {line} has {len(row)} cells, expected {len(header)}")
        name = row[0].strip()
        if not name:
            raise InputError(path, f"line {line} has no channel name")
        numbers = []
        for receiver, cell in zip(receivers, row[1:], strict=True):
            try:
                numbers.append(float(cell))
            except ValueError:
                raise InputError(path, f"line {line} ({name} -> {receiver}): {cell.strip()!r} is not a number") from None
        sources.append(name)
        table.append(numbers)
    refuse_duplicate_names(path, sources, "row")
    if set(sources) != set(receivers):
        only_rows = [c for c in sources if c not in receivers]
        only_cols = [c for c in receivers if c not in sources]
        parts = []
        if only_rows:
            parts.append("rows only: " + ", ".join(only_rows))
        if only_cols:
            parts.append("columns only: " + ", ".join(only_cols))
        raise InputError(path, "rows and columns must name the same channels (" + "; ".join(parts) + ")")
    values = np.asarray(table, dtype=np.float64)[:, [receivers.index(c) for c in sources]]
    if channels is None:
        return tuple(sources), values
    if set(sources) != set(channels):
        raise InputError(path, "names other channels than the spillover matrix beside it")
    order = [sources.index(c) for c in channels]
    return tuple(channels), values[np.ix_(order, order)]



def write_spillover(path: str | Path, matrix: SpilloverMatrix, *, heatmap: str | Path | None = None) -> Path:
    """Write a spillover matrix as CSV, with its interval files and an optional heatmap.

    Every file is written to a temporary name in its folder and then renamed, so a
    reader never sees a half-written file.

    Parameters
    ----------
    path : str or Path
        The CSV to write (rows = sources, columns = receivers).
    matrix : SpilloverMatrix
        The matrix; when it has ``low``/``high`` they go to ``<stem>.low.csv`` and
        ``<stem>.high.csv`` beside the CSV (same layout).
    heatmap : str or Path, optional
        A PNG to draw: the matrix in percent, sources down, receivers across.

    Returns
    -------
    Path
        The CSV written.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "spill.csv"
    >>> _ = write_spillover(p, SpilloverMatrix(("Nd145", "Nd146"), [[1, 0.02], [0, 1]]))
    >>> p.read_text().splitlines()[1]
    'Nd145,1,0.02'
    """
    path = Path(path)
    check_spillover(matrix, source=path)
    write_atomic(path, _matrix_csv_text(matrix.channels, matrix.values).encode())
    if matrix.low is not None and matrix.high is not None:
        for bound_path, bound in zip(interval_paths(path), (matrix.low, matrix.high), strict=True):
            write_atomic(bound_path, _matrix_csv_text(matrix.channels, bound).encode())
    if heatmap is not None:
        write_atomic(Path(heatmap), _heatmap_png(matrix))
    return path


def _matrix_csv_text(channels: Sequence[str], values: np.ndarray) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["", *channels])
    for name, row in zip(channels, values, strict=True):
        writer.writerow([name, *(format(float(v), _VALUE_FORMAT) for v in row)])
    return buffer.getvalue()


def _heatmap_png(matrix: SpilloverMatrix) -> bytes:
    import matplotlib

    from .._version import __version__

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    n = len(matrix.channels)
    size = max(4.0, 0.32 * n + 1.5)
    fig = Figure(figsize=(size + 1.0, size))
    ax = fig.add_subplot()
    shown = np.where(np.eye(n, dtype=bool), np.nan, matrix.values * 100.0)
    image = ax.imshow(shown, cmap="magma_r", vmin=0.0, interpolation="nearest")
    ax.set_xticks(range(n), matrix.channels, rotation=90, fontsize=7)
    ax.set_yticks(range(n), matrix.channels, fontsize=7)
    ax.set_xlabel("receiving channel")
    ax.set_ylabel("source channel")
    ax.set_title("spillover (% of the source's signal; diagonal hidden)", fontsize=9)
    fig.colorbar(image, ax=ax, shrink=0.8, label="%")
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, metadata={"Software": f"plexwash {__version__}"})
    return buffer.getvalue()
