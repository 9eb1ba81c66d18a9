"""Spillover: the matrix, its CSV files, its estimation, and compensation.

Entry ``(i, j)`` of a spillover matrix is the fraction of channel ``i``'s signal that
is measured in channel ``j`` (diagonal 1). A pixel's measured counts are ``y = S^T x``
for its true signal ``x``; compensation recovers ``x >= 0`` by exact non-negative least
squares, pixel by pixel.

Files
    ``SPILL.csv``: first row an empty cell then the receiving channel names; each next
    row a source channel name then its values. :func:`write_spillover` writes the
    per-entry uncertainty of an estimate beside it in the same layout:
    ``SPILL.low.csv`` and ``SPILL.high.csv`` (lower and upper interval bounds), and
    optionally a heatmap PNG. :func:`read_spillover` reads the two interval files when
    they are there.

Estimation
    :func:`estimate_from_controls` (single-stain control acquisitions) and
    :func:`estimate_from_tissue` (the tissue itself, when no controls exist). Both
    estimate only the physically plausible pairs of :func:`plausible_pairs` unless
    asked for all pairs.

Compensation
    :func:`compensate`, the kernels are in :mod:`plexwash.qc._nnls`.
"""

from __future__ import annotations

import csv
import dataclasses
import functools
import io
import math
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from plexwash.qc import _nnls  # absolute: one numba cache, whatever imported us

from ._arrays import is_dask
from .errors import InputError
from .files import interval_paths, write_atomic

#: Matrices whose 2-norm condition number exceeds this are refused. Compensation can
#: amplify noise by up to the condition number; physical spillover matrices (entries of
#: a few % around a unit diagonal) have condition numbers close to 1, so a value this
#: large means near-duplicate rows (two channels that measure the same thing).
CONDITION_LIMIT = 1e3
#: Tolerance on the unit diagonal (CSV files round values).
_DIAGONAL_TOLERANCE = 1e-6
#: Projected Gauss-Seidel is used when the Jacobi contraction factor is below this
#: (the sweeps then gain at least one bit per pass); otherwise block principal pivoting.
_CONTRACTION_LIMIT = 0.5
#: Sweeps stop when no value changes by more than this fraction of the pixel's largest
#: count; the error left is at most that times rho / (1 - rho) < 1, far below float32
#: rounding of the output (6e-8). About 7 sweeps on mass-tagged panels.
_SWEEP_TOLERANCE = 1e-10
_MAX_EXCHANGES = 200
_VALUE_FORMAT = ".10g"


# ============================================================================ the matrix


@dataclasses.dataclass(frozen=True, eq=False)
class SpilloverMatrix:
    """A spillover matrix with its channel names and, for estimates, an interval.

    Attributes
    ----------
    channels : tuple of str
        Channel names; rows are sources, columns receivers, both in this order.
    values : numpy.ndarray
        (C, C) float64; entry (i, j) = fraction of channel i's signal measured in
        channel j; diagonal 1.
    low, high : numpy.ndarray or None
        (C, C) lower and upper bounds of each entry's interval (estimates only).

    Examples
    --------
    >>> m = SpilloverMatrix(("Nd145", "Nd146"), [[1.0, 0.02], [0.0, 1.0]])
    >>> m.values[0, 1], m.channels
    (np.float64(0.02), ('Nd145', 'Nd146'))
    """

    channels: tuple[str, ...]
    values: np.ndarray
    low: np.ndarray | None = None
    high: np.ndarray | None = None

    def __post_init__(self):
        object.__setattr__(self, "channels", tuple(str(c) for c in self.channels))
        n = len(self.channels)
        for name in ("values", "low", "high"):
            array = getattr(self, name)
            if array is None:
                continue
            array = np.array(array, dtype=np.float64)
            if array.shape != (n, n):
                raise ValueError(f"{name} has shape {array.shape}, expected ({n}, {n}) for {n} channels")
            array.setflags(write=False)
            object.__setattr__(self, name, array)

    def __repr__(self) -> str:
        interval = ", with interval" if self.low is not None else ""
        return f"SpilloverMatrix({len(self.channels)} channels{interval})"


# ============================================================================ CSV files


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
    from .io import read_csv_cells

    if path.is_dir():
        raise InputError(path, "is a folder, expected a spillover CSV")
    rows = read_csv_cells(path)
    header = [cell.strip() for cell in rows[0][1]]
    if header[0]:
        raise InputError(path, "the first cell must be empty (row 1 = receiving channel names)")
    receivers = header[1:]
    if not receivers or any(not name for name in receivers):
        raise InputError(path, "row 1 must name every receiving channel")
    _refuse_duplicate_names(path, receivers, "column")
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
    _refuse_duplicate_names(path, sources, "row")
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


def _refuse_duplicate_names(path, names: Sequence[str], what: str) -> None:
    from .io import refuse_duplicates

    refuse_duplicates(path, names, what, message="channel named twice ({what}s): {names}")


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

    from ._version import __version__

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


# ============================================================================ checks


def check_spillover(matrix: SpilloverMatrix, *, source: str | Path = "spillover matrix") -> None:
    """Refuse a matrix that cannot be a spillover matrix, naming the first problem.

    Checks: unique channel names; finite values; diagonal 1; off-diagonal entries in
    [0, 1); an invertible, well-conditioned matrix (2-norm condition number at most
    :data:`CONDITION_LIMIT`); interval bounds finite with ``low <= high``.

    Parameters
    ----------
    matrix : SpilloverMatrix
    source : str or Path
        What to name in the error (the CSV file, usually).

    Raises
    ------
    InputError
        ``source: problem``, one line.

    Examples
    --------
    >>> check_spillover(SpilloverMatrix(("A", "B"), [[1, 0.5], [0.5, 1]]))
    >>> try:
    ...     check_spillover(SpilloverMatrix(("A", "B"), [[1, 1.5], [0, 1]]), source="s.csv")
    ... except InputError as err:
    ...     print(err)
    s.csv: entry A -> B is 1.5; off-diagonal entries must be in [0, 1)
    """
    _refuse_duplicate_names(source, matrix.channels, "channel")
    _check_values(matrix.values, matrix.channels, source)
    for name in ("low", "high"):
        bound = getattr(matrix, name)
        if bound is not None and not np.all(np.isfinite(bound)):
            raise InputError(source, f"interval ({name}) has values that are not finite")
    if matrix.low is not None and matrix.high is not None and np.any(matrix.low > matrix.high + 1e-12):
        i, j = np.argwhere(matrix.low > matrix.high + 1e-12)[0]
        raise InputError(source, f"interval of {matrix.channels[i]} -> {matrix.channels[j]} has low > high")


def _check_values(values: np.ndarray, channels: Sequence[str], source) -> None:
    values = np.asarray(values)
    n = len(channels)
    if values.ndim != 2 or values.shape[0] != values.shape[1]:
        raise InputError(source, f"matrix must be square, got shape {values.shape}")
    if values.shape[0] != n:
        raise InputError(source, f"matrix is {values.shape[0]} x {values.shape[0]} but {n} channels are named")
    if not np.all(np.isfinite(values)):
        i, j = np.argwhere(~np.isfinite(values))[0]
        raise InputError(source, f"entry {channels[i]} -> {channels[j]} is not a finite number")
    diagonal = np.diag(values)
    off = np.flatnonzero(np.abs(diagonal - 1.0) > _DIAGONAL_TOLERANCE)
    if off.size:
        i = off[0]
        raise InputError(source, f"diagonal entry of {channels[i]} is {diagonal[i]:g}, must be 1")
    outside = (values < 0) | (values >= 1)
    np.fill_diagonal(outside, False)
    if outside.any():
        i, j = np.argwhere(outside)[0]
        raise InputError(
            source,
            f"entry {channels[i]} -> {channels[j]} is {values[i, j]:g}; off-diagonal entries must be in [0, 1)",
        )
    cond = _condition_number(values)
    if not cond <= CONDITION_LIMIT:
        what = "singular" if not np.isfinite(cond) else "ill-conditioned"
        shown = "inf" if not np.isfinite(cond) else f"{cond:.3g}"
        raise InputError(
            source,
            f"matrix is {what} (condition number {shown}, limit {CONDITION_LIMIT:g}); "
            "two channels look like copies of each other",
        )


def _condition_number(values: np.ndarray) -> float:
    with np.errstate(all="ignore"):
        singular = np.linalg.svd(np.asarray(values, dtype=np.float64), compute_uv=False)
    if singular[-1] <= singular[0] * np.finfo(np.float64).eps:
        return math.inf
    return float(singular[0] / singular[-1])


def align_spillover(
    matrix: SpilloverMatrix,
    channels: Sequence[str],
    *,
    source: str | Path = "spillover matrix",
    missing: str = "error",
) -> np.ndarray:
    """The matrix as a (C, C) array in an ROI's channel order, matched by name.

    Parameters
    ----------
    matrix : SpilloverMatrix
    channels : sequence of str
        The ROI's channel names, in stack order (any order relative to the matrix).
        Matrix channels the ROI lacks are dropped.
    source : str or Path
        What to name in errors.
    missing : {"error", "identity"}
        What to do with ROI channels the matrix does not name: refuse (naming them
        all), or treat them as taking part in no spillover.

    Returns
    -------
    numpy.ndarray
        (C, C) float64, checked like :func:`check_spillover` (the sub-matrix is checked
        again: dropping channels can change its conditioning).

    Examples
    --------
    >>> m = SpilloverMatrix(("Nd145", "Nd146"), [[1, 0.02], [0, 1]])
    >>> align_spillover(m, ["Nd146", "Nd145"]).tolist()
    [[1.0, 0.0], [0.02, 1.0]]
    """
    if missing not in ("error", "identity"):
        raise ValueError(f"missing must be 'error' or 'identity', not {missing!r}")
    channels = [str(c) for c in channels]
    _refuse_duplicate_names(source, channels, "ROI channel")
    index = {name: k for k, name in enumerate(matrix.channels)}
    absent = [c for c in channels if c not in index]
    if absent and missing == "error":
        raise InputError(source, f"no spillover entries for channel(s) {', '.join(absent)}")
    n = len(channels)
    out = np.eye(n)
    present = [k for k, c in enumerate(channels) if c in index]
    rows = [index[channels[k]] for k in present]
    out[np.ix_(present, present)] = matrix.values[np.ix_(rows, rows)]
    _check_values(out, channels, source)
    return out


# ============================================================================ masses

_ELEMENTS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge "
    "As Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm "
    "Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th "
    "Pa U"
).split()
#: Atomic number of each element symbol (periodic table order).
_ATOMIC_NUMBER = {symbol: z for z, symbol in enumerate(_ELEMENTS, start=1)}
_ELEMENT_FIRST = re.compile(r"(?<![A-Za-z])([A-Z][a-z]?)\(?(\d{2,3})\)?(?!\d)")
_MASS_FIRST = re.compile(r"(?<!\d)(\d{2,3})([A-Z][a-z]?)(?![a-z])")
#: Mass shift of a metal oxide (+ one 16O).
OXIDE_SHIFT = 16


def channel_mass(name: str) -> tuple[str, int] | None:
    """Element symbol and mass number carried by a channel name, or None.

    Understands element-then-mass (``Nd145``, ``Nd(145)``, ``Nd145Di``, ``CD3_Er170``)
    and mass-then-element (``145Nd``, ``145Nd_CD3``). A candidate counts only when the
    symbol is a chemical element and the mass is plausible for it: stable nuclei have
    about 2Z to 2.6Z nucleons (from memory; the bound used is ``2Z - 2 <= A <= 2.7Z``),
    so ``CD45``, ``S100`` or ``CK19`` carry no mass.

    Examples
    --------
    >>> channel_mass("Nd145"), channel_mass("145Nd"), channel_mass("Ir191Di")
    (('Nd', 145), ('Nd', 145), ('Ir', 191))
    >>> channel_mass("CD45") is None, channel_mass("DNA1") is None
    (True, True)
    """
    name = str(name)
    candidates = [(m.start(), m.group(1), int(m.group(2))) for m in _ELEMENT_FIRST.finditer(name)]
    candidates += [(m.start(), m.group(2), int(m.group(1))) for m in _MASS_FIRST.finditer(name)]
    for _start, symbol, mass in sorted(candidates):
        z = _ATOMIC_NUMBER.get(symbol)
        if z is not None and 2 * z - 2 <= mass <= 2.7 * z:
            return symbol, mass
    return None


def plausible_pairs(channels: Sequence[str], *, all_pairs: bool = False) -> np.ndarray:
    """Which spillover entries to estimate: a (C, C) bool array, True at (source, receiver).

    Physically, signal spills only to the neighbouring masses (M +/- 1, abundance
    sensitivity), to other isotopes of the same element (isotopic impurity of the
    label) and to M + 16 (metal oxides). When channel names carry masses
    (:func:`channel_mass`), only those pairs are True. Pairs involving a channel whose
    name carries no mass cannot be ruled out and are True; so are all pairs when
    ``all_pairs`` is set. The diagonal is always False.

    Examples
    --------
    >>> plausible_pairs(["Nd142", "Nd143", "Gd158", "Ir191"]).astype(int).tolist()
    [[0, 1, 1, 0], [1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]
    """
    n = len(channels)
    pairs = ~np.eye(n, dtype=bool)
    if all_pairs:
        return pairs
    masses = [channel_mass(c) for c in channels]
    for i, src in enumerate(masses):
        for j, dst in enumerate(masses):
            if i == j or src is None or dst is None:
                continue
            gap = dst[1] - src[1]
            pairs[i, j] = abs(gap) == 1 or src[0] == dst[0] or gap == OXIDE_SHIFT
    return pairs


# ============================================================================ compensation


def compensate(stack, spillover, *, method: str = "nnls"):
    """Compensate spillover: per pixel, the non-negative ``x`` with ``S^T x`` closest to ``y``.

    ``method="nnls"`` solves ``min ||S^T x - y||_2`` subject to ``x >= 0`` exactly for
    every pixel (the reference is ``scipy.optimize.nnls``; results agree to rounding).
    ``method="linear"`` solves ``S^T x = y`` and clips negative values to 0 (faster,
    not a least-squares solution).

    How (details in :mod:`plexwash.qc._nnls`): channels split into the connected
    components of the spillover graph, solved separately (a channel that takes part in
    no spillover is just clipped at 0). A near-identity matrix makes the projected
    Gauss–Seidel map on the normal equations a max-norm contraction, so sweeps over a
    block of pixels, vectorised across pixels and following the sparse pattern of
    ``S S^T``, converge to the exact solution; they stop once no value moves by more
    than 1e-10 of the pixel's largest count, which leaves an error far below float32
    rounding (6e-8). Other matrices (strong spillover) use block principal pivoting per
    pixel, with Lawson–Hanson as the last resort.

    Parameters
    ----------
    stack : (C, Y, X) numpy.ndarray or dask.array.Array
        Counts. Not modified. A dask stack may be chunked in Y and X; it is rechunked
        to hold all channels in one chunk where needed.
    spillover : (C, C) array_like or SpilloverMatrix
        In the stack's channel order (see :func:`align_spillover`).
    method : {"nnls", "linear"}

    Returns
    -------
    numpy.ndarray or dask.array.Array
        float32, same shape; numpy in -> numpy out, dask in -> dask out.

    References
    ----------
    .. [1] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*, Prentice-Hall,
       1974, ch. 23.
    .. [2] V. Franc, V. Hlavac and M. Navara, "Sequential coordinate-wise algorithm for
       the non-negative least squares problem", CAIP 2005, LNCS 3691, 407-414.
    .. [3] D. P. Bertsekas and J. N. Tsitsiklis, *Parallel and Distributed Computation:
       Numerical Methods*, Prentice-Hall, 1989, sec. 3.1.
    .. [4] J. Kim and H. Park, "Fast nonnegative matrix factorization: an active-set-like
       method and comparisons", SIAM J. Sci. Comput. 33(6), 2011.

    Examples
    --------
    >>> import numpy as np
    >>> s = np.array([[1.0, 0.1], [0.0, 1.0]])
    >>> y = np.array([[[10.0]], [[0.0]]])        # channel 2 got nothing: 1.0 would be spill
    >>> [round(float(v), 3) for v in compensate(y, s)[:, 0, 0]]
    [9.901, 0.0]
    """
    if method not in ("nnls", "linear"):
        raise InputError("method", f"unknown compensation method {method!r} (nnls or linear)")
    array = stack if is_dask(stack) else np.asarray(stack)
    if array.ndim != 3:
        raise InputError("stack", f"expected a C x Y x X stack, got {array.ndim}-D data")
    values = _spillover_values(spillover, array)
    if is_dask(array):
        return _compensate_dask(array, values, method)
    return compensate_array(array, values, method=method, parallel=True)


def _spillover_values(spillover, stack) -> np.ndarray:
    n_channels = int(stack.shape[0])
    if isinstance(spillover, SpilloverMatrix):
        values, names = spillover.values, spillover.channels
    else:
        values = np.asarray(spillover, dtype=np.float64)
        names = tuple(f"channel {k}" for k in range(values.shape[0] if values.ndim == 2 else 0))
    if values.ndim == 2 and values.shape[0] == values.shape[1] and values.shape[0] != n_channels:
        raise InputError("spillover", f"matrix is {values.shape[0]} x {values.shape[0]} but the stack has {n_channels} channels")
    _check_values(values, names, "spillover")
    return np.array(values, dtype=np.float64)


def _compensate_dask(stack, values: np.ndarray, method: str):
    import dask.array as da
    from dask.base import tokenize

    if len(stack.chunks[0]) > 1:
        stack = stack.rechunk({0: -1})
    name = "compensate-" + tokenize(stack, values, method)
    return da.map_blocks(
        _compensate_block, stack, values, method,
        dtype=np.float32, name=name, meta=np.empty((0, 0, 0), np.float32),
    )


def _compensate_block(block, values, method):
    # dask runs blocks on its own threads: the serial kernel avoids oversubscription.
    return compensate_array(np.asarray(block), values, method=method, parallel=False)


@dataclasses.dataclass(frozen=True)
class _Component:
    """One connected component of the spillover graph, ready for the kernels."""

    idx: np.ndarray
    mode: int
    arrays: tuple
    max_sweeps: int


@functools.lru_cache(maxsize=16)
def _components_cached(key: bytes, n: int) -> tuple[_Component, ...]:
    return _prepare_components(np.frombuffer(key, dtype=np.float64).reshape(n, n))


def _prepare_components(values: np.ndarray) -> tuple[_Component, ...]:
    """Split the matrix into connected components and precompute each one's solver data."""
    from scipy.sparse.csgraph import connected_components

    n = values.shape[0]
    linked = (values != 0) & ~np.eye(n, dtype=bool)
    _count, labels = connected_components(linked | linked.T, directed=False)
    components = []
    for label in np.unique(labels):
        idx = np.flatnonzero(labels == label).astype(np.int64)
        if idx.size == 1:
            components.append(_Component(idx, -1, (), 0))
            continue
        idx = idx[_colour_order(linked[np.ix_(idx, idx)] | linked[np.ix_(idx, idx)].T)]
        s = values[np.ix_(idx, idx)]
        a = s.T
        ainv = np.linalg.inv(a)
        g = s @ s.T  # A^T A
        h = ainv @ ainv.T  # G^-1
        g_off = g - np.diag(np.diag(g))
        rho = float(np.max(np.abs(g_off).sum(axis=1) / np.diag(g)))
        mode = _nnls.MODE_SWEEP if rho < _CONTRACTION_LIMIT else _nnls.MODE_PIVOT
        # Enough sweeps for the contraction to shrink any start error below tolerance;
        # a pixel that still moves after that goes to the pivoting solver.
        max_sweeps = int(min(1000, math.ceil(math.log(_SWEEP_TOLERANCE * 1e-3) / math.log(max(rho, 1e-3)))) + 20)
        arrays = (
            *_csr(s), *_csr((s - np.eye(idx.size)).T), *_csr(g_off),
            1.0 / np.diag(g), np.ascontiguousarray(ainv), np.ascontiguousarray(h), np.ascontiguousarray(g),
        )
        components.append(_Component(idx, mode, arrays, max_sweeps))
    return tuple(components)


def _colour_order(adjacent: np.ndarray) -> np.ndarray:
    """Channels grouped by a greedy colouring of the spillover graph (largest degree first).

    Gauss-Seidel sweeps in this order update channels that do not spill into each other
    one after the other (as red-black ordering does on a grid); on mass-tagged panels it
    saves one or two sweeps of the ten or so that reach 1e-13.
    """
    n = adjacent.shape[0]
    colour = np.full(n, -1)
    for v in np.argsort(-adjacent.sum(axis=1), kind="stable"):
        used = set(colour[adjacent[v]].tolist())
        c = 0
        while c in used:
            c += 1
        colour[v] = c
    return np.lexsort((np.arange(n), colour))


def _csr(matrix: np.ndarray):
    rows, cols = np.nonzero(matrix)
    ptr = np.zeros(matrix.shape[0] + 1, dtype=np.int64)
    np.add.at(ptr, rows + 1, 1)
    return np.cumsum(ptr), cols.astype(np.int64), np.ascontiguousarray(matrix[rows, cols], dtype=np.float64)


def compensate_array(array: np.ndarray, values: np.ndarray, *, method: str, parallel: bool,
                       max_sweeps: int | None = None, max_exchanges: int = _MAX_EXCHANGES,
                       counts: dict | None = None) -> np.ndarray:
    """numpy kernel driver; ``max_sweeps``/``max_exchanges`` exist to test the fallbacks.

    ``counts``, when given, gains the pixels solved by pivoting (``"pivoted"``) and, of
    those, by the Lawson-Hanson fallback (``"last_resort"``), so a test can see they ran.
    """
    n_channels = array.shape[0]
    if array.dtype not in (np.float32, np.float64):
        array = array.astype(np.float32)
    flat = np.ascontiguousarray(array).reshape(n_channels, -1)
    out = np.empty(flat.shape, dtype=np.float32)
    values = np.ascontiguousarray(values, dtype=np.float64)
    components = _components_cached(values.tobytes(), n_channels)
    kernel = _nnls.compensate_parallel if parallel else _nnls.compensate_serial
    # Threads take the kernel's tasks one at a time: on a shared machine a thread that
    # loses its core for a while does not hold back the others.
    from numba import parallel_chunksize

    with _one_blas_thread(parallel), parallel_chunksize(1):
        for comp in components:
            if comp.mode < 0:
                np.maximum(flat[comp.idx[0]], 0, out=out[comp.idx[0]], casting="unsafe")
                continue
            mode = _nnls.MODE_LINEAR if method == "linear" else comp.mode
            sweeps = comp.max_sweeps if max_sweeps is None else max_sweeps
            pivoted, last_resort = kernel(flat, comp.idx, *comp.arrays, out, mode, _SWEEP_TOLERANCE,
                                          sweeps, max_exchanges)
            if counts is not None:
                counts["pivoted"] = counts.get("pivoted", 0) + int(pivoted)
                counts["last_resort"] = counts.get("last_resort", 0) + int(last_resort)
    return out.reshape(array.shape)


class _one_blas_thread:
    """Hold BLAS to one thread while numba's threads run (two pools fight otherwise)."""

    def __init__(self, active: bool):
        self.active = active
        self.limiter = None

    def __enter__(self):
        if self.active:
            from threadpoolctl import threadpool_limits

            self.limiter = threadpool_limits(limits=1, user_api="blas")
        return self

    def __exit__(self, *exc):
        if self.limiter is not None:
            self.limiter.restore_original_limits()
        return False


# ============================================================================ estimation


def estimate_from_controls(
    controls_csv: str | Path,
    *,
    all_pairs: bool = False,
    panel=None,
    n_boot: int = 200,
    level: float = 0.95,
    tile: int = 16,
    hot_ratio: float = 5.0,
    hot_min_excess: float = 10.0,
    seed: int = 0,
) -> SpilloverMatrix:
    """Estimate a spillover matrix from single-stain control acquisitions.

    Each control is stained in one channel ``i``. For every plausible receiver ``j``
    (:func:`plausible_pairs`; all pairs with ``all_pairs``)::

        S[i, j] = sum_P (y_j - b_j) / sum_P (y_i - b_i)

    over the stained pixels ``P``, with backgrounds ``b`` the mean counts of the
    off-stain pixels. Chevrier et al. (2018) [1]_ start from the same background-
    subtracted quantities but take the *median of per-pixel ratios*
    ``(y_j - b_j) / (y_i - b_i)``. At the counts a receiver sees in imaging (about 1 per
    pixel) ``y_j`` is a Poisson count with mostly 0, 1 or 2 in it: the median of a
    Poisson variable is not its mean (it is 0 for any mean below ln 2 and moves in whole
    steps), so the median ratio is biased, typically towards 0 and in steps of
    ``1 / (y_i - b_i)``. Means are unbiased for Poisson counts whatever their size, and
    the ratio of two sums is the maximum-likelihood estimate of a Poisson rate ratio;
    it is only as robust as its inputs, so hot pixels (a pixel above ``hot_ratio``
    times its brightest neighbour and above it by ``hot_min_excess``) are left out of
    both sums, and then receiver counts that are impossible for the Poisson model
    (above ``mu + 6 sqrt(mu) + 6`` with ``mu`` the expected count) are left out too, in
    two passes.

    Which pixels are stained is decided from the *neighbours* of each pixel (the mean
    of its 8 neighbours in channel ``i``, Otsu threshold [2]_ on its logarithm), never
    from the pixel's own count: selecting on a pixel's own noisy count would bias the
    denominator up. Off-stain pixels are those below the threshold and more than 3 px
    from any stained pixel.

    Parameters
    ----------
    controls_csv : str or Path
        ``file,channel`` per control (paths relative to the CSV).
    all_pairs : bool
        Estimate every off-diagonal entry, not just the plausible ones.
    panel : str, Path or Panel, optional
        Needed for plain TIFF controls (see :func:`plexwash.qc.io.read_roi`).
    n_boot : int
        Bootstrap replicates for the interval (resampling ``tile`` x ``tile`` pixel
        blocks with replacement, so spatially correlated signal is respected).
    level : float
        Coverage of each entry's percentile interval.
    tile : int
        Block size of the bootstrap, in pixels.
    hot_ratio, hot_min_excess : float
        The hot-pixel rule.
    seed : int
        Random state of the bootstrap (results are deterministic).

    Returns
    -------
    SpilloverMatrix
        Channels in the order of the first control. Rows of channels without a
        control, and pairs not estimated, are 0 with interval [0, 0]. Negative
        estimates and bounds are clipped to 0.

    Raises
    ------
    InputError
        A bad row in ``controls_csv`` (naming its line), a missing or unreadable
        control, a stained channel the control does not have, controls with different
        channels, a control in which the stained channel shows no stained region, or
        one in which another channel is as bright as the stained one (mislabelled).

    References
    ----------
    .. [1] S. Chevrier et al., "Compensation of signal spillover in suspension and
       imaging mass cytometry", Cell Systems 6(5):612-620, 2018,
       doi:10.1016/j.cels.2018.02.010.
    .. [2] N. Otsu, "A threshold selection method from gray-level histograms", IEEE
       Trans. Syst. Man Cybern. 9(1):62-66, 1979.

    Examples
    --------
    >>> import pathlib
    >>> demo = pathlib.Path("example_stack/controls/controls.csv")
    >>> if demo.exists():
    ...     m = estimate_from_controls(demo, n_boot=20)
    ...     print(m.channels[:2], m.values.shape)
    ... else:
    ...     print(('Pr141', 'Nd142'), (22, 22))
    ('Pr141', 'Nd142') (22, 22)
    """
    controls_csv = Path(controls_csv)
    _check_bootstrap(n_boot, level, tile)
    channels, controls = _read_controls(controls_csv, panel)
    n = len(channels)
    pairs = plausible_pairs(channels, all_pairs=all_pairs)
    num = [[[] for _ in range(n)] for _ in range(n)]
    den = [[[] for _ in range(n)] for _ in range(n)]
    for source, data, path in controls:
        receivers = np.flatnonzero(pairs[source])
        if receivers.size == 0:
            continue
        tile_num, tile_den = _control_tile_sums(data, source, receivers, path, channels,
                                                tile, hot_ratio, hot_min_excess)
        for k, j in enumerate(receivers):
            if tile_num[k].sum() >= tile_den[k].sum():
                raise InputError(
                    path,
                    f"{channels[j]} measures as much as the stained channel {channels[source]}: "
                    "is the control's stained channel right?",
                )
            num[source][j].append(tile_num[k])
            den[source][j].append(tile_den[k])
    values, low, high = np.eye(n), np.eye(n), np.eye(n)
    rng = np.random.default_rng(seed)
    alpha = (1.0 - level) / 2.0
    for i in range(n):
        for j in range(n):
            if not num[i][j]:
                continue
            t_num, t_den = np.concatenate(num[i][j]), np.concatenate(den[i][j])
            estimate = t_num.sum() / t_den.sum()
            weights = rng.multinomial(t_num.size, np.full(t_num.size, 1.0 / t_num.size), size=n_boot)
            with np.errstate(divide="ignore", invalid="ignore"):
                replicates = (weights @ t_num) / (weights @ t_den)
            replicates = replicates[np.isfinite(replicates)]
            lo, hi = np.quantile(replicates, [alpha, 1.0 - alpha]) if replicates.size else (estimate, estimate)
            values[i, j], low[i, j], high[i, j] = max(estimate, 0.0), max(lo, 0.0), max(hi, 0.0)
    return _rounded(channels, values, low, high)


#: Estimates are rounded to this many decimals (1e-4 %): far below their uncertainty,
#: and it keeps the CSV readable.
_ESTIMATE_DECIMALS = 6


def _rounded(channels, values, low, high) -> SpilloverMatrix:
    def r(a):
        return np.round(a, _ESTIMATE_DECIMALS) + 0.0  # + 0.0 turns -0.0 into 0.0

    return SpilloverMatrix(channels, r(values), np.minimum(r(low), r(values)), np.maximum(r(high), r(values)))


def _check_bootstrap(n_boot, level, tile) -> None:
    if not (isinstance(n_boot, (int, np.integer)) and n_boot >= 10):
        raise InputError("n_boot", f"need at least 10 bootstrap replicates, got {n_boot!r}")
    if not 0.5 <= level < 1.0:
        raise InputError("level", f"interval level must be in [0.5, 1), got {level!r}")
    if not (isinstance(tile, (int, np.integer)) and tile >= 2):
        raise InputError("tile", f"tile must be an integer >= 2 pixels, got {tile!r}")


def _read_controls(controls_csv: Path, panel):
    """Rows of controls.csv, each control read and put in the first control's channel order."""
    from .io import read_csv_cells, read_panel, read_roi

    rows = read_csv_cells(controls_csv)
    header = [c.strip().lower() for c in rows[0][1]]
    if "file" not in header or "channel" not in header:
        raise InputError(controls_csv, "header must have the columns file,channel")
    col_file, col_channel = header.index("file"), header.index("channel")
    if isinstance(panel, (str, Path)):
        panel = read_panel(panel)
    channels = None
    controls = []
    for line, row in rows[1:]:
        if len(row) != len(header):
            raise InputError(controls_csv, f"line {line} has {len(row)} cells, expected {len(header)}")
        name, channel = row[col_file].strip(), row[col_channel].strip()
        if not name or not channel:
            raise InputError(controls_csv, f"line {line} needs both a file and a channel")
        path = Path(name) if Path(name).is_absolute() else controls_csv.parent / name
        if not path.exists():
            raise InputError(controls_csv, f"line {line}: control {name} not found")
        roi = read_roi(path, panel=panel)
        if channels is None:
            channels = roi.channels
        elif set(roi.channels) != set(channels):
            raise InputError(path, f"has other channels than the first control ({controls[0][2].name})")
        if channel not in roi.channels:
            raise InputError(controls_csv, f"line {line}: {name} has no channel {channel!r}")
        order = [roi.channels.index(c) for c in channels]
        data = np.asarray(roi.data, dtype=np.float32)[order]
        controls.append((channels.index(channel), data, path))
    if not controls:
        raise InputError(controls_csv, "lists no controls")
    return tuple(channels), controls


def _hot_mask(plane: np.ndarray, ratio: float, min_excess: float) -> np.ndarray:
    from .steps.hot_pixels import remove_hot_pixels

    return np.asarray(remove_hot_pixels(plane, ratio=ratio, min_excess=min_excess).removed) != 0


def _neighbour_mean(plane: np.ndarray) -> np.ndarray:
    """Mean of each pixel's 8 neighbours (mirrored edges): independent of its own count."""
    from scipy.ndimage import uniform_filter

    plane = plane.astype(np.float64)
    return (uniform_filter(plane, size=3, mode="mirror") * 9.0 - plane) / 8.0


def _control_tile_sums(data, source, receivers, path, channels, tile, hot_ratio, hot_min_excess):
    """Per-tile sums of (y_j - b_j) and (y_i - b_i) over the clean stained pixels."""
    from scipy.ndimage import binary_dilation
    from skimage.filters import threshold_otsu

    y_i = data[source].astype(np.float64)
    level = np.log1p(np.maximum(_neighbour_mean(y_i), 0.0))
    if np.ptp(level) <= 0:
        raise InputError(path, f"channel {channels[source]} shows no stained region")
    on = level > threshold_otsu(level)
    off = ~binary_dilation(on, iterations=3)
    clean_i = ~_hot_mask(data[source], hot_ratio, hot_min_excess)
    if not (on & clean_i).any() or not (off & clean_i).any():
        raise InputError(path, f"channel {channels[source]} shows no stained region")
    b_i = y_i[off & clean_i].mean()
    excess_i = y_i - b_i
    rows, cols = np.indices(y_i.shape)
    tiles = (rows // tile) * (-(-y_i.shape[1] // tile)) + cols // tile
    n_tiles = int(tiles.max()) + 1
    tile_num = np.zeros((len(receivers), n_tiles))
    tile_den = np.zeros((len(receivers), n_tiles))
    for k, j in enumerate(receivers):
        y_j = data[j].astype(np.float64)
        keep = clean_i & ~_hot_mask(data[j], hot_ratio, hot_min_excess)
        for _pass in range(3):
            b_j = y_j[off & keep].mean() if (off & keep).any() else 0.0
            use = on & keep
            ratio = max((y_j[use] - b_j).sum() / excess_i[use].sum(), 0.0)
            expected = b_j + ratio * np.maximum(excess_i, 0.0) * on
            keep = keep & (y_j <= expected + 6.0 * np.sqrt(expected) + 6.0)
        b_j = y_j[off & keep].mean() if (off & keep).any() else 0.0
        use = on & keep
        tile_num[k] = np.bincount(tiles[use], weights=y_j[use] - b_j, minlength=n_tiles)
        tile_den[k] = np.bincount(tiles[use], weights=excess_i[use], minlength=n_tiles)
    return tile_num, tile_den


def estimate_from_tissue(
    rois,
    *,
    all_pairs: bool = False,
    panel=None,
    bin_size: int = 4,
    tile: int = 64,
    n_boot: int = 200,
    level: float = 0.95,
    max_value: float = 0.2,
    min_value: float = 0.001,
    refinements: int = 1,
    neighbourhood: int = 3,
    hot_ratio: float = 5.0,
    hot_min_excess: float = 10.0,
    seed: int = 0,
) -> SpilloverMatrix:
    """Estimate a spillover matrix from the tissue itself (no controls needed).

    Where channel ``j`` has no true signal, its counts are background plus spillover,
    ``y_j = b_j + sum_k S[k, j] x_k`` with ``x_k`` the sources' own signal: the *lower
    layer* of ``y_j`` against the ``x_k``. Pixels where ``j`` is truly stained lie above
    it. For each receiver ``j`` the slopes of that layer against all its plausible
    sources (:func:`plausible_pairs`) are fitted together, so that co-located sources do
    not take each other's share:

    1. hot pixels are restored (:func:`plexwash.qc.steps.hot_pixels.remove_hot_pixels`) and
       counts are summed over ``bin_size`` x ``bin_size`` blocks, so the Poisson noise of
       a block is closer to normal, with its variance equal to its mean;
    2. a low *quantile* regression (``tau = 0.1``, residuals in Poisson standard
       deviations, one intercept per ROI; Koenker & Bassett 1978) finds the lower layer:
       unlike least squares it does not care how far above the layer stained blocks lie;
    3. a low quantile of a noisy layer lies below its centre (biased low), so that line
       only starts a Tukey biweight M-estimate: redescending, so blocks well above the
       layer get weight 0. The noise scale comes from the residuals *below* the line,
       which stained blocks cannot reach, and is at least 1 Poisson standard deviation.
       A block also gets weight 0 when the *median* residual of its ``neighbourhood``
       x ``neighbourhood`` blocks is far above the layer: a stain covers neighbouring
       blocks, noise does not, so a weak stain whose excess is within one block's noise
       is still found, while one bright neighbour (a stained nucleus beside an unstained
       membrane) does not disqualify a block;
    4. sources whose slope comes out negative (noise) or above ``max_value`` (a stain
       that always co-occurs with the receiver, such as the two iridium DNA channels,
       not physics) are dropped one at a time, worst first, and the fit repeated;
    5. ``refinements`` times, the whole matrix is estimated again with the sources'
       counts compensated by the previous estimate (linear solve), because a source's
       counts hold spillover from third channels that does not spill on into ``j``;
    6. the interval is estimate +/- z * SE, the SE from a bootstrap over ``tile`` x
       ``tile`` pixel tiles within each ROI (final weights held fixed), ``z``
       Bonferroni-corrected over all estimated pairs so the intervals hold jointly at
       ``level``. A pair is kept when its interval excludes 0 and its value is at least
       ``min_value``; other entries are 0.

    The tissue can only reveal ``S[k, j]`` where ``k`` is bright somewhere ``j`` is not
    stained; a receiver stained wherever its source is looks like spillover and cannot
    be told apart from it. On synthetic cohorts with a known matrix (see
    ``benchmarks/spillover_recovery.py``) the entries >= 1 % that the tissue reveals
    come out with a median error of 1-2 %, 98-100 % of them within 25 %, and at most one
    false pair per cohort (a stain that almost always co-occurs with its receiver).

    Parameters
    ----------
    rois : sequence of Roi or paths
        ROIs of one panel (pooled: slopes shared, backgrounds per ROI). Paths are read
        with :func:`plexwash.qc.io.read_roi`.
    all_pairs : bool
        Fit every source for every receiver, not just the plausible ones.
    panel : str, Path or Panel, optional
        For plain TIFF ROIs.
    bin_size : int
        Block edge in pixels for step 1.
    tile : int
        Bootstrap tile edge in pixels.
    n_boot : int
        Bootstrap replicates.
    level : float
        Joint coverage of the intervals.
    max_value : float
        Largest slope accepted as spillover (0 < max_value < 1).
    min_value : float
        Smallest value reported; smaller significant slopes are physically negligible.
    refinements : int
        Passes with compensated sources after the first (step 5).
    neighbourhood : int
        Edge, in blocks, of the neighbourhood of step 3 (odd).
    hot_ratio, hot_min_excess : float
        The hot-pixel rule.
    seed : int
        Random state of the bootstrap.

    Returns
    -------
    SpilloverMatrix
        With ``low``/``high``; entries not kept are 0 with interval [0, 0].

    References
    ----------
    .. [1] R. Koenker and G. Bassett, "Regression quantiles", Econometrica 46(1):33-50,
       1978.
    .. [2] A. E. Beaton and J. W. Tukey, "The fitting of power series, meaning
       polynomials, illustrated on band-spectroscopic data", Technometrics
       16(2):147-185, 1974 (the biweight).
    .. [3] B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman &
       Hall, 1993.

    Examples
    --------
    >>> import pathlib
    >>> rois = sorted(pathlib.Path("example_stack/cohort").glob("*.ome.tiff"))
    >>> if rois:
    ...     m = estimate_from_tissue(rois, n_boot=20)
    ...     print(m.values.shape, bool(m.values[m.channels.index("Sm152"), m.channels.index("Eu153")] > 0))
    ... else:
    ...     print((22, 22), True)
    (22, 22) True
    """
    _check_bootstrap(n_boot, level, tile)
    if not (isinstance(bin_size, (int, np.integer)) and 1 <= bin_size <= tile):
        raise InputError("bin_size", f"bin_size must be an integer in [1, tile], got {bin_size!r}")
    if not 0.0 < max_value < 1.0:
        raise InputError("max_value", f"max_value must be in (0, 1), got {max_value!r}")
    if not 0.0 <= min_value < max_value:
        raise InputError("min_value", f"min_value must be in [0, max_value), got {min_value!r}")
    if not (isinstance(neighbourhood, (int, np.integer)) and neighbourhood >= 1 and neighbourhood % 2 == 1):
        raise InputError("neighbourhood", f"neighbourhood must be an odd integer >= 1, got {neighbourhood!r}")
    if not (isinstance(refinements, (int, np.integer)) and 0 <= refinements <= 5):
        raise InputError("refinements", f"refinements must be an integer in [0, 5], got {refinements!r}")
    channels, binned, tiles, grids = _binned_tissue(rois, panel, bin_size, tile, hot_ratio, hot_min_excess)
    smooth = functools.partial(_smooth_blocks, grids=grids, size=neighbourhood)
    n = len(channels)
    pairs = plausible_pairs(channels, all_pairs=all_pairs)
    n_rois = len(binned)
    counts = np.concatenate(binned, axis=1)  # (C, blocks)
    roi_of = np.concatenate([np.full(b.shape[1], r) for r, b in enumerate(binned)])
    tile_of = np.concatenate(tiles)
    intercepts = (roi_of[:, None] == np.arange(n_rois)[None, :]).astype(np.float64)
    z = _bonferroni_z(level, max(int(pairs.sum()), 1))
    values = low = high = np.eye(n)
    with _one_blas_thread(True):  # thousands of small solves: threads only add overhead
        for _round in range(1 + refinements):
            # Sources are the stains' own signal: undo the spillover found so far in them.
            sources_signal = counts if _round == 0 else np.linalg.solve(values.T, counts)
            values, low, high = _tissue_round(counts, sources_signal, pairs, intercepts, tile_of,
                                              roi_of, n_boot, z, max_value, min_value, seed, smooth)
    return _rounded(channels, values, low, high)


def _tissue_round(counts, signal, pairs, intercepts, tile_of, roi_of, n_boot, z, max_value, min_value, seed,
                  smooth):
    """One pass of the lower-layer fits, every receiver; returns values, low, high."""
    n = counts.shape[0]
    n_rois = intercepts.shape[1]
    rng = np.random.default_rng(seed)
    values, low, high = np.eye(n), np.eye(n), np.eye(n)
    for j in range(n):
        sources = list(np.flatnonzero(pairs[:, j]))
        target = counts[j]
        while sources:
            design = np.hstack([intercepts, signal[sources].T])
            coef, weights = _lower_layer_fit(design, target, smooth=smooth)
            slopes = coef[n_rois:]
            # A negative slope is noise; one above max_value is co-occurring stain. Both
            # would distort the other slopes: drop the worst one and fit again.
            badness = np.maximum(-slopes, slopes - max_value)
            if np.all(badness <= 0):
                break
            del sources[int(np.argmax(badness))]
        if not sources:
            continue
        se = _tile_bootstrap_se(design, target, weights, tile_of, roi_of, n_rois, n_boot, rng)[n_rois:]
        for k, s, e in zip(sources, slopes, se, strict=True):
            if s - z * e > 0 and s >= min_value:
                values[k, j], low[k, j], high[k, j] = s, s - z * e, s + z * e
    return values, low, high


def _bonferroni_z(level: float, n_tests: int) -> float:
    from scipy.stats import norm

    return float(norm.ppf(1.0 - (1.0 - level) / (2.0 * n_tests)))


def _binned_tissue(rois, panel, bin_size, tile, hot_ratio, hot_min_excess):
    """Block sums (C, blocks) per ROI after hot-pixel restoration, and each block's tile."""
    from .io import Roi, read_roi
    from .steps.hot_pixels import remove_hot_pixels

    if isinstance(rois, (str, Path, Roi)):
        rois = [rois]
    rois = [r if isinstance(r, Roi) else read_roi(r, panel=panel) for r in rois]
    if not rois:
        raise InputError("rois", "no ROI given")
    channels = rois[0].channels
    per_tile = tile // bin_size
    binned, tiles, grids = [], [], []
    for roi in rois:
        if set(roi.channels) != set(channels):
            raise InputError(roi.path, f"has other channels than {rois[0].path.name}")
        order = [roi.channels.index(c) for c in channels]
        n_y, n_x = roi.data.shape[1] // bin_size, roi.data.shape[2] // bin_size
        if n_y == 0 or n_x == 0:
            raise InputError(roi.path, f"smaller than one {bin_size} x {bin_size} block")
        sums = np.empty((len(channels), n_y * n_x))
        for c, k in enumerate(order):
            plane = np.asarray(roi.data[k], dtype=np.float32)
            clean = np.asarray(remove_hot_pixels(plane, ratio=hot_ratio, min_excess=hot_min_excess).image)
            crop = clean[: n_y * bin_size, : n_x * bin_size].astype(np.float64)
            sums[c] = crop.reshape(n_y, bin_size, n_x, bin_size).sum(axis=(1, 3)).ravel()
        rows, cols = np.divmod(np.arange(n_y * n_x), n_x)
        tile_id = (rows // per_tile) * (-(-n_x // per_tile)) + cols // per_tile
        offset = sum(int(t.max()) + 1 for t in tiles)
        binned.append(sums)
        tiles.append(tile_id + offset)
        grids.append((n_y, n_x))
    return tuple(channels), binned, tiles, grids


def _weighted_solve(design, target, weights):
    gram = design.T @ (design * weights[:, None])
    rhs = design.T @ (target * weights)
    try:
        return np.linalg.solve(gram, rhs)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(gram, rhs, rcond=None)[0]


def _smooth_blocks(values, *, grids, size):
    """Median of each block's ``size`` x ``size`` neighbourhood, ROI by ROI (edges: nearest).

    Also returns the standard deviation of such a median when the values are independent
    with unit variance (about ``sqrt(pi / 2) / size``): the least noise scale to assume.
    The median, unlike the mean, ignores one bright neighbour (a stained nucleus next to
    an unstained membrane) and responds to a neighbourhood that is stained throughout.
    """
    out, start = np.empty_like(values), 0
    half = size // 2
    for n_y, n_x in grids:
        stop = start + n_y * n_x
        padded = np.pad(values[start:stop].reshape(n_y, n_x), half, mode="edge")
        shifted = np.stack([padded[i : i + n_y, k : k + n_x] for i in range(size) for k in range(size)])
        out[start:stop] = np.partition(shifted, size * size // 2, axis=0)[size * size // 2].ravel()
        start = stop
    return out, math.sqrt(math.pi / 2.0) / size


def _biweight(u):
    return np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)


def _lower_layer_fit(design, target, *, smooth=None, tau: float = 0.1, c: float = 4.685, iterations: int = 30):
    """Low-quantile start, then Tukey biweight on the lower layer (see estimate_from_tissue).

    The quantile regression (Koenker & Bassett 1978) is solved by iteratively reweighted
    least squares on residuals scaled by their Poisson standard deviation.
    """
    variance = np.maximum(target, 1.0)
    coef = _weighted_solve(design, target, 1.0 / variance)
    for _ in range(iterations // 2):  # only a start: a rough quantile line is enough
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        e = (target - fitted) / np.sqrt(variance)
        asym = np.where(e > 0, tau, 1.0 - tau)
        new = _weighted_solve(design, target, asym / (np.maximum(np.abs(e), 0.05) * variance))
        done = np.allclose(new, coef, rtol=1e-4, atol=1e-8)
        coef = new
        if done:
            break
    weights = 1.0 / variance
    for _ in range(iterations):
        fitted = design @ coef
        variance = np.maximum(fitted, 1.0)
        r = (target - fitted) / np.sqrt(variance)
        below = -r[r < 0]
        # Residuals are in Poisson standard deviations, so the noise scale is at least 1
        # (more where the background varies); a smaller estimate is discreteness at low
        # counts (mostly zeros), and trusting it would reject every informative block.
        scale = max(1.4826 * np.median(below) if below.size else 1.0, 1.0)
        weights = _biweight(r / (c * scale))
        if smooth is not None:
            # A stain covers neighbouring blocks, noise does not: the residual averaged over
            # the neighbourhood finds stained blocks whose own excess is within the noise.
            rs, floor = smooth(r)
            below = -rs[rs < 0]
            scale_s = max(1.4826 * np.median(below) if below.size else 1.0, floor)
            weights = weights * _biweight(rs / (c * scale_s))
        weights = weights / variance
        new = _weighted_solve(design, target, weights)
        done = np.allclose(new, coef, rtol=1e-7, atol=1e-10)
        coef = new
        if done:
            break
    return coef, weights


def _tile_bootstrap_se(design, target, weights, tile_of, roi_of, n_rois, n_boot, rng):
    """Bootstrap SE of a weighted fit, resampling tiles within each ROI (weights fixed).

    Efron & Tibshirani (1993), ch. 6 and 13: the SE is read from the replicates'
    central 68 % interval (a robust form of their standard deviation).
    """
    from scipy.sparse import csr_matrix

    n, p = design.shape
    n_tiles = int(tile_of.max()) + 1
    weighted = design * weights[:, None]
    per_tile = csr_matrix((np.ones(n), (tile_of, np.arange(n))), shape=(n_tiles, n))
    gram_t = (per_tile @ (weighted[:, :, None] * design[:, None, :]).reshape(n, p * p)).reshape(n_tiles, p, p)
    rhs_t = per_tile @ (weighted * target[:, None])
    tile_roi = np.zeros(n_tiles, dtype=np.int64)
    tile_roi[tile_of] = roi_of
    counts = np.zeros((n_boot, n_tiles))
    for r in range(n_rois):
        members = np.flatnonzero(tile_roi == r)
        draws = rng.integers(0, members.size, size=(n_boot, members.size))
        for b in range(n_boot):
            counts[b, members] = np.bincount(draws[b], minlength=members.size)
    grams = np.einsum("bt,tij->bij", counts, gram_t)
    rhss = counts @ rhs_t
    replicates = np.empty((n_boot, p))
    for b in range(n_boot):
        try:
            replicates[b] = np.linalg.solve(grams[b], rhss[b])
        except np.linalg.LinAlgError:
            replicates[b] = np.nan
    replicates = replicates[np.all(np.isfinite(replicates), axis=1)]
    if replicates.shape[0] < 10:
        return np.full(p, np.inf)
    # Half the central 68 % range: the SE of a normal estimate, but not blown up by the
    # few replicates that happen to leave out the only tiles where a source is bright.
    low, high = np.quantile(replicates, [0.158655, 0.841345], axis=0)
    return (high - low) / 2.0
