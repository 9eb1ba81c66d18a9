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

import numpy as np

from ..files import write_atomic
from .estimates import benjamini_hochberg
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


def classify(found, *, level, min_value, false_pair_rate, max_width,
              background_error, negligible, max_bias=0.25, max_scatter=2.0, max_ring=1.0) -> list[dict]:
    """Each tested pair's status: reported, absent or not identifiable.

    ``found`` holds one dict per tested pair from the fits of
    :func:`~.tissue.estimate_tissue_pairs` (its step 8 states the rules).
    """
    from scipy.stats import norm

    if not found:
        return []
    estimate = np.array([f["estimate"] for f in found])
    se = np.array([f["se"] for f in found])
    with np.errstate(divide="ignore", invalid="ignore"):
        p_value = np.where(np.isfinite(se) & (se > 0), norm.sf(estimate / se), 1.0)
    p_value = np.where(np.isfinite(se) & (se == 0) & (estimate > 0), 0.0, p_value)
    selected = benjamini_hochberg(p_value, false_pair_rate)
    m, r = len(found), int(selected.sum())
    # intervals of the selected pairs at the false-coverage-adjusted level (Benjamini &
    # Yekutieli 2005): 1 - R (1 - level) / m
    z = float(norm.ppf(1.0 - max(r, 1) * (1.0 - level) / (2.0 * m)))
    rows = []
    for f, p, sel in zip(found, p_value, selected, strict=True):
        s, e = f["estimate"], f["se"]
        low, high = s - z * e, s + z * e
        bias = background_error * f["background"] / f["level"] if f["level"] > 0 else np.inf
        row = dict(f, p_value=float(p), low=low, high=high, estimate=s)
        if f["dropped"] and s > 0:
            row.update(status=NOT_IDENTIFIABLE, reason="co-occurs with the receiver's stain",
                       low=0.0, high=0.0)
        elif f["dropped"]:
            row.update(status=ABSENT, reason="slope below 0", low=0.0, high=0.0)
        elif bias > max_bias * max(s, negligible):
            row.update(status=NOT_IDENTIFIABLE,
                       reason=f"source dim ({f['level']:.3g} counts per pixel; a "
                              f"{background_error:.0%} background error would read as {bias:.2%})")
        elif f["ring"] > max_ring:
            row.update(status=NOT_IDENTIFIABLE,
                       reason=f"receiver as high around the source as on it (its own stain over "
                              f"the source's region; {f['ring']:.1f} x the ghost)")
        elif f["scatter"] > max_scatter:
            row.update(status=NOT_IDENTIFIABLE,
                       reason=f"receiver's own stain goes with the source (scatter "
                              f"{f['scatter']:.1f} x Poisson where the ghost shows)")
        elif sel and s >= min_value and z * e <= max_width * s:
            row.update(status=REPORTED, reason="")
        elif sel and s >= min_value:
            row.update(status=NOT_IDENTIFIABLE, reason="interval wide")
        elif high < negligible:
            row.update(status=ABSENT, reason=f"below {negligible:.2%}")
        else:
            row.update(status=NOT_IDENTIFIABLE, reason="interval wide")
        rows.append(row)
    return rows
