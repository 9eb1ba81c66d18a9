"""The list of pairs a tissue estimate could not identify, written beside the matrix.

``plexwash spill tissue ... -o SPILL.csv`` leaves such pairs at 0 in ``SPILL.csv`` and
lists them in ``SPILL.not_identifiable.csv`` (columns :data:`COLUMNS`), so the user knows
which entries the tissue cannot tell (a dim source, a wide interval, a receiver stain that
goes with the source) rather than reading them as "no spillover".
"""

from __future__ import annotations

import csv
import dataclasses
import io
from pathlib import Path

from ..files import write_atomic
from .matrix import SpilloverMatrix

REPORTED, ABSENT, NOT_IDENTIFIABLE = "reported", "absent", "not identifiable"

#: Header of the not-identifiable list.
COLUMNS = ("source", "receiver", "reason", "estimate", "low", "high", "p_value", "source_level")


@dataclasses.dataclass(frozen=True)
class TissuePair:
    """One tested (source, receiver) pair of a tissue estimate.

    ``status`` is ``"reported"`` (its value is in the matrix), ``"absent"`` (its interval
    lies below ``negligible``, or its slope is negative) or ``"not identifiable"`` (the
    tissue cannot tell its size: ``reason`` says why; the matrix holds 0). ``estimate``,
    ``low``, ``high`` are the fitted slope and its interval; ``p_value`` the one-sided
    p-value of the slope being > 0; ``source_level`` the source's information-weighted
    signal in counts per pixel; ``scatter`` the receiver's scatter around the fit where
    the ghost shows, in Poisson standard deviations, and ``ring`` its level on the bins
    around the ghost as a share of the ghost (NaN when the ghost shows nowhere).
    """

    source: str
    receiver: str
    status: str
    reason: str
    estimate: float
    low: float
    high: float
    p_value: float
    source_level: float
    scatter: float
    ring: float


@dataclasses.dataclass(frozen=True)
class TissueEstimate:
    """A tissue spillover estimate: the ``matrix`` and every tested pair's outcome."""

    matrix: SpilloverMatrix
    pairs: tuple[TissuePair, ...]
    false_pair_rate: float

    @property
    def not_identifiable(self) -> list[TissuePair]:
        """The pairs the tissue cannot identify (0 in the matrix)."""
        return [p for p in self.pairs if p.status == NOT_IDENTIFIABLE]


def not_identifiable_path(path: str | Path) -> Path:
    """The list of not-identifiable pairs that goes with a spillover CSV.

    Examples
    --------
    >>> not_identifiable_path("runs/spill.csv").name
    'spill.not_identifiable.csv'
    """
    path = Path(path)
    stem = path.name[: -len(".csv")] if path.name.lower().endswith(".csv") else path.name
    return path.with_name(stem + ".not_identifiable.csv")


def write_not_identifiable(path: str | Path, estimate) -> Path:
    """Write ``estimate.not_identifiable`` (a :class:`~.tissue.TissueEstimate`) as CSV, atomically."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(COLUMNS)
    for pair in estimate.not_identifiable:
        writer.writerow([pair.source, pair.receiver, pair.reason, repr(pair.estimate),
                         repr(pair.low), repr(pair.high), f"{pair.p_value:.3g}",
                         repr(pair.source_level)])
    return write_atomic(Path(path), buffer.getvalue().encode())
