"""Across ROIs: modified z-scores and cohort outliers (Iglewicz & Hoaglin 1993), overall and
within batch, and the batch test (Kruskal-Wallis) of each channel."""

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


# --------------------------------------------------------------------------- batches

#: ROI-level statistics compared between batches: column of the quality table -> what it is.
BATCH_METRICS = {"sbr": "signal-to-background ratio", "background_mean": "background level",
                 "p99": "signal (99th percentile)"}
#: Batches with fewer ROIs than this take no part in a channel's batch test (common practice:
#: the chi-squared approximation of the Kruskal-Wallis H needs more than a handful per group).
MIN_BATCH_ROIS = 3
#: Flag on quality rows whose metric is far from the other ROIs of the same batch.
BATCH_OUTLIER_FLAG = "batch-outlier"
#: Verdict on a channel whose batches differ (the batch table and the report).
BATCH_EFFECT_FLAG = "batch-effect"


def kruskal_wallis(*groups) -> tuple[float, float]:
    """Kruskal-Wallis H test of k independent samples: ``(H, p)``.

    Ranks all values together (ties get their average rank),
    ``H = 12 / (N (N + 1)) * sum(R_i^2 / n_i) - 3 (N + 1)`` divided by the tie correction
    ``1 - sum(t^3 - t) / (N^3 - N)``; p from the chi-squared distribution with k - 1
    degrees of freedom (the regularised upper incomplete gamma function). NaNs are dropped.

    References
    ----------
    .. [1] W. H. Kruskal and W. A. Wallis, "Use of ranks in one-criterion variance analysis",
       J. Am. Stat. Assoc. 47 (1952) 583-621.

    Examples
    --------
    >>> h, p = kruskal_wallis([1, 2, 3, 4], [5, 6, 7, 8])
    >>> round(h, 4), round(p, 4)
    (5.3333, 0.0209)
    """
    from scipy.special import gammaincc
    from scipy.stats import rankdata

    samples = [np.asarray(g, dtype=np.float64) for g in groups]
    samples = [g[np.isfinite(g)] for g in samples]
    if len(samples) < 2 or any(g.size == 0 for g in samples):
        raise InputError("batches", "the Kruskal-Wallis test needs at least two non-empty groups")
    values = np.concatenate(samples)
    n = values.size
    ranks = rankdata(values)
    _, counts = np.unique(values, return_counts=True)
    correction = 1.0 - float(np.sum(counts.astype(float) ** 3 - counts)) / (n ** 3 - n)
    if correction <= 0:  # every value equal: no evidence of any difference
        return 0.0, 1.0
    h, start = 0.0, 0
    for g in samples:
        h += ranks[start:start + g.size].sum() ** 2 / g.size
        start += g.size
    h = (12.0 / (n * (n + 1)) * h - 3.0 * (n + 1)) / correction
    return float(h), float(gammaincc((len(samples) - 1) / 2.0, h / 2.0))


def batch_differences(table: Iterable[Mapping], *, alpha: float = 0.001, fold: float = 1.25,
                      metrics: Iterable[str] = tuple(BATCH_METRICS), stage: str = "raw") -> list[dict]:
    """Per channel and metric: do the batches differ? (Kruskal-Wallis on ROI-level values).

    Rows of one ``stage`` are grouped by channel, then by ``batch``; batches with fewer
    than :data:`MIN_BATCH_ROIS` ROIs are left out. A channel's metric differs when the
    test's p < ``alpha`` *and* the largest batch median is at least ``fold`` times the
    smallest (a difference large enough to matter, not only detectable in a big cohort).

    Returns
    -------
    list of dict
        One per channel x metric with two batches or more: ``channel``, ``stage``,
        ``metric``, ``batches`` (how many took part), ``rois``, ``h``, ``p``, ``fold``
        (largest / smallest batch median), ``high``, ``low`` (those batches),
        ``medians`` ({batch: median}), ``differs`` (bool).

    Examples
    --------
    >>> rows = [{"roi": f"{b}{k}", "channel": "CD3", "stage": "raw", "batch": b,
    ...          "sbr": (30.0 if b == "B" else 10.0) + k} for b in "AB" for k in range(8)]
    >>> [(d["metric"], d["differs"]) for d in batch_differences(rows, metrics=["sbr"])]
    [('sbr', True)]
    """
    if not (0 < alpha < 1):
        raise InputError("batch_alpha", f"must be between 0 and 1, got {alpha!r}")
    groups: dict[str, dict[str, dict[str, list[float]]]] = {}
    metrics = list(metrics)
    for row in table:
        batch = row.get("batch")
        if row.get("stage", stage) != stage or batch in (None, ""):
            continue
        per = groups.setdefault(row["channel"], {})
        for metric in metrics:
            per.setdefault(metric, {}).setdefault(str(batch), []).append(_as_float(row.get(metric)))
    out = []
    for channel, per in groups.items():
        for metric in metrics:
            batches = {b: np.asarray(v)[np.isfinite(v)] for b, v in sorted(per.get(metric, {}).items())}
            batches = {b: v for b, v in batches.items() if v.size >= MIN_BATCH_ROIS}
            if len(batches) < 2:
                continue
            h, p = kruskal_wallis(*batches.values())
            medians = {b: float(np.median(v)) for b, v in batches.items()}
            high, low = max(medians, key=medians.get), min(medians, key=medians.get)
            ratio = (medians[high] / medians[low] if medians[low] > 0
                     else (math.inf if medians[high] > 0 else 1.0))
            out.append({"channel": channel, "stage": stage, "metric": metric,
                        "batches": len(batches), "rois": int(sum(v.size for v in batches.values())),
                        "h": h, "p": p, "fold": ratio, "high": high, "low": low,
                        "medians": medians, "differs": bool(p < alpha and ratio >= fold)})
    return out


def batch_effect_channels(differences: Iterable[Mapping]) -> list[str]:
    """Channels with at least one metric whose batches differ, in first-seen order."""
    return list(dict.fromkeys(d["channel"] for d in differences if d["differs"]))


def add_batch_outlier_flags(table: Iterable[Mapping], *, metric: str = "sbr", cutoff: float = 3.5,
                            log_scale: bool = True, min_rois: int = 5) -> list[dict]:
    """Copies of the rows with ``batch-outlier`` flagged within each batch (modified z-score).

    As :func:`add_outlier_flags`, but the groups are (channel, stage, batch): an ROI far
    from the other ROIs of its own batch. Every row gains ``<metric>_batch_modified_z``;
    batches with fewer than ``min_rois`` ROIs get scores but no flag; rows without a
    batch get None.
    """
    rows = [dict(row) for row in table]
    key = f"{metric}_batch_modified_z"
    by_batch: dict[str, list[int]] = {}
    for k, row in enumerate(rows):
        row[key] = None
        if row.get("batch") not in (None, ""):
            by_batch.setdefault(str(row["batch"]), []).append(k)
    for members in by_batch.values():
        subset = [rows[k] for k in members]
        enough = len({r["roi"] for r in subset}) >= min_rois
        for k, score in zip(members, _cohort_scores(subset, metric, log_scale), strict=True):
            if np.isfinite(score):
                rows[k][key] = float(score)
                if enough and abs(score) > cutoff:
                    rows[k]["flags"] = _add_flag(rows[k].get("flags", []), BATCH_OUTLIER_FLAG)
    return rows
