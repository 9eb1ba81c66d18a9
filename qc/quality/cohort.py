"""Across ROIs: modified z-scores and cohort outliers (Iglewicz & Hoaglin 1993)."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

import numpy as np

from ..errors import InputError
from .settings import FLAG_SEPARATOR, OUTLIER_FLAG

# Consistency constant of the modified z-score: 0.6745 = Phi^-1(0.75), so that
# MAD / 0.6745 estimates the standard deviation of normal data (Iglewicz & Hoaglin 1993).
_MAD_CONSTANT = 0.6745


# Used when MAD = 0: mean absolute deviation * 1.253314 (= sqrt(pi / 2)) estimates
# the standard deviation of normal data (common practice).
_MEAN_AD_CONSTANT = 1.253314


def modified_z_scores(values) -> np.ndarray:
    """Modified z-scores ``M = 0.6745 (x - median) / MAD``.

    MAD is the median absolute deviation from the median. NaN values are ignored
    in the median and MAD and give NaN. When MAD = 0 (more than half the values
    equal), the mean absolute deviation is used instead:
    ``M = (x - median) / (1.253314 * MeanAD)`` (common practice); when that is 0
    too (all values equal), every M is 0.

    Parameters
    ----------
    values : array_like of float

    Returns
    -------
    ndarray of float

    References
    ----------
    .. [1] B. Iglewicz and D. Hoaglin, *How to Detect and Handle Outliers*, ASQC
       Basic References in Quality Control vol. 16, 1993.
    .. [2] NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.5.17
       (Detection of Outliers).

    Examples
    --------
    >>> modified_z_scores([1.0, 2.0, 3.0, 4.0, 100.0]).round(3).tolist()
    [-1.349, -0.674, 0.0, 0.674, 65.427]
    """
    x = np.asarray(values, dtype=np.float64)
    out = np.full(x.shape, np.nan)
    finite = np.isfinite(x)
    if not finite.any():
        return out
    v = x[finite]
    median = np.median(v)
    deviation = np.abs(v - median)
    mad = np.median(deviation)
    if mad > 0:
        out[finite] = _MAD_CONSTANT * (v - median) / mad
    else:
        mean_ad = deviation.mean()
        out[finite] = (v - median) / (_MEAN_AD_CONSTANT * mean_ad) if mean_ad > 0 else 0.0
    return out


def cohort_outliers(table: Iterable[Mapping], *, metric: str = "sbr", cutoff: float = 3.5,
                    log_scale: bool = False) -> list[dict]:
    """ROIs whose metric is far from the cohort's, per channel (modified z-score).

    Rows are grouped by ``channel`` (and by ``stage`` when rows carry one);
    within a group, a row is an outlier when ``|M| > cutoff`` for its metric
    (:func:`modified_z_scores`; 3.5 is the cutoff recommended by Iglewicz &
    Hoaglin). Rows whose metric is missing or not finite take no part.

    Parameters
    ----------
    table : iterable of mapping
        Quality rows with at least ``roi``, ``channel`` and ``metric``.
    metric : str
        The column to judge (``sbr``, ``snr``, ``foreground_fraction``...).
    cutoff : float
        Flag when ``|M|`` exceeds this.
    log_scale : bool
        Judge ``log(metric)`` (for ratio-scale metrics such as SBR; non-positive
        values then take no part).

    Returns
    -------
    list of dict
        One per outlier row, in table order: ``roi``, ``channel``, ``stage`` (or
        None), ``metric``, ``value``, ``modified_z``.

    Examples
    --------
    >>> rows = [{"roi": f"r{k}", "channel": "CD3", "sbr": v}
    ...         for k, v in enumerate([10.0, 11.0, 9.5, 10.5, 2.0])]
    >>> [o["roi"] for o in cohort_outliers(rows)]
    ['r4']
    """
    rows = list(table)
    if not (cutoff > 0):
        raise InputError("cutoff", f"must be > 0, got {cutoff!r}")
    scores = _cohort_scores(rows, metric, log_scale)
    out = []
    for row, score in zip(rows, scores, strict=True):
        if np.isfinite(score) and abs(score) > cutoff:
            out.append({"roi": row["roi"], "channel": row["channel"], "stage": row.get("stage"),
                        "metric": metric, "value": _as_float(row.get(metric)),
                        "modified_z": float(score)})
    return out


def add_outlier_flags(table: Iterable[Mapping], *, metric: str = "sbr", cutoff: float = 3.5,
                      log_scale: bool = False) -> list[dict]:
    """Copies of the quality rows with ``outlier`` added to the flags of cohort outliers.

    Also adds ``modified_z`` (of ``metric``; None where it is undefined) to every
    row. ``flags`` keep their
    form: a list stays a list, a ``';'``-joined string stays a string.

    Examples
    --------
    >>> rows = [{"roi": f"r{k}", "channel": "CD3", "sbr": v, "flags": []}
    ...         for k, v in enumerate([10.0, 11.0, 9.5, 10.5, 2.0])]
    >>> [r["flags"] for r in add_outlier_flags(rows)]
    [[], [], [], [], ['outlier']]
    """
    rows = [dict(row) for row in table]
    if not (cutoff > 0):
        raise InputError("cutoff", f"must be > 0, got {cutoff!r}")
    for row, score in zip(rows, _cohort_scores(rows, metric, log_scale), strict=True):
        row["modified_z"] = float(score) if np.isfinite(score) else None
        if np.isfinite(score) and abs(score) > cutoff:
            row["flags"] = _add_flag(row.get("flags", []), OUTLIER_FLAG)
    return rows


def _cohort_scores(rows: list[Mapping], metric: str, log_scale: bool) -> np.ndarray:
    """Modified z-score of every row's metric within its (channel, stage) group."""
    groups: dict[tuple, list[int]] = {}
    values = np.full(len(rows), np.nan)
    for k, row in enumerate(rows):
        for key in ("roi", "channel"):
            if key not in row:
                raise InputError("quality table", f"row {k + 1} has no {key!r}")
        groups.setdefault((row["channel"], row.get("stage")), []).append(k)
        values[k] = _as_float(row.get(metric))
    if log_scale:
        positive = values > 0
        values = np.where(positive, np.log(np.where(positive, values, 1.0)), np.nan)
    scores = np.full(len(rows), np.nan)
    for members in groups.values():
        scores[members] = modified_z_scores(values[members])
    return scores


def _as_float(value) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _add_flag(flags, flag: str):
    if isinstance(flags, str):
        parts = [f for f in flags.split(FLAG_SEPARATOR) if f]
        return FLAG_SEPARATOR.join(parts if flag in parts else parts + [flag])
    parts = list(flags or [])
    return parts if flag in parts else parts + [flag]
