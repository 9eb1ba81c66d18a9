"""The spillover matrix: its type, its checks, and its alignment to an ROI's channels.

Entry ``(i, j)`` of a spillover matrix is the fraction of channel ``i``'s signal that
is measured in channel ``j`` (diagonal 1). :func:`check_spillover` is the one check of a
matrix: reading, writing, aligning, compensating and the studio's matrix editor all
refuse what it refuses, with its message.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..errors import InputError

#: Matrices whose 2-norm condition number exceeds this are refused. Compensation can
#: amplify noise by up to the condition number; physical spillover matrices (entries of
#: a few % around a unit diagonal) have condition numbers close to 1, so a value this
#: large means near-duplicate rows (two channels that measure the same thing).
CONDITION_LIMIT = 1e3
#: Tolerance on the unit diagonal (CSV files round values).
_DIAGONAL_TOLERANCE = 1e-6


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


def refuse_duplicate_names(path, names: Sequence[str], what: str) -> None:
    """Refuse channel names given twice (``what``: rows, columns, ROI channels...)."""
    from ..io import refuse_duplicates

    refuse_duplicates(path, names, what, message="channel named twice ({what}s): {names}")


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
    refuse_duplicate_names(source, matrix.channels, "channel")
    check_values(matrix.values, matrix.channels, source)
    for name in ("low", "high"):
        bound = getattr(matrix, name)
        if bound is not None and not np.all(np.isfinite(bound)):
            raise InputError(source, f"interval ({name}) has values that are not finite")
    if matrix.low is not None and matrix.high is not None and np.any(matrix.low > matrix.high + 1e-12):
        i, j = np.argwhere(matrix.low > matrix.high + 1e-12)[0]
        raise InputError(source, f"interval of {matrix.channels[i]} -> {matrix.channels[j]} has low > high")


def check_values(values: np.ndarray, channels: Sequence[str], source) -> None:
    """The value checks of :func:`check_spillover` on a bare (C, C) array.

    Square and named by ``channels``; finite; diagonal 1; off-diagonal entries in
    [0, 1); 2-norm condition number at most :data:`CONDITION_LIMIT`. Raises
    :class:`~plexwash.qc.errors.InputError` naming ``source`` and the first problem.
    """
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
    refuse_duplicate_names(source, channels, "ROI channel")
    index = {name: k for k, name in enumerate(matrix.channels)}
    absent = [c for c in channels if c not in index]
    if absent and missing == "error":
        raise InputError(source, f"no spillover entries for channel(s) {', '.join(absent)}")
    n = len(channels)
    out = np.eye(n)
    present = [k for k, c in enumerate(channels) if c in index]
    rows = [index[channels[k]] for k in present]
    out[np.ix_(present, present)] = matrix.values[np.ix_(rows, rows)]
    check_values(out, channels, source)
    return out
