"""Crosstalk audit: co-positivity of declared mutually exclusive markers, raw vs washed.

Two markers that never share a cell (two lineage markers, a tumour and an immune
marker) should not be positive in the same place more often than chance. Where they are,
spillover (or noise) is left. The recipe declares such pairs (``[audit] exclusive``); for
every ROI, pair and stage (``raw``, ``washed``) the audit measures:

Definitions
-----------
1. **Units.** The ROI is cut into ``block`` x ``block`` pixel bins (the last row and
   column of bins may be partial); each bin holds the mean of its pixels. Neighbouring
   pixels of one cell are not independent draws, so the counts below are of bins, not
   pixels. Only bins inside the tissue count (the tissue mask of
   :func:`plexwash.qc.background.tissue_mask`, computed once per ROI on the raw stack and
   used for both stages; a bin is tissue when most of its pixels are).
2. **Clearly positive.** A bin is positive for a marker when its mean exceeds the
   marker's Otsu threshold (N. Otsu, IEEE Trans. Syst. Man Cybern. 9(1):62-66, 1979;
   ``skimage.filters.threshold_otsu``) found on ``log1p`` of the tissue bins' means, per
   marker and per stage.
3. **co_positive** = ``n_AB / min(n_A, n_B)``: the fraction of the *rarer* marker's
   positive bins that are also positive for the other (the overlap coefficient of the two
   positive sets, Szymkiewicz-Simpson). It is symmetric in A and B, so it does not depend
   on which marker is brighter (spillover runs from the bright marker into the dim one;
   conditioning on one marker would read differently depending on the direction).
   Empty when either marker has no positive bin.
4. **expected** = the same quantity under chance: with ``N`` tissue bins and each
   marker's own positive count, independence gives ``E[n_AB] = n_A n_B / N``, hence
   ``expected = max(n_A, n_B) / N`` (the larger of the two positive fractions).
5. **Test.** One-sided hypergeometric test of ``n_AB``: ``p = P(X >= n_AB)`` with
   ``X ~ Hypergeometric(N, n_A, n_B)`` (the one-sided Fisher exact test of the 2 x 2 table
   of the two markers' positivity; reference ``scipy.stats.hypergeom`` and
   ``scipy.stats.fisher_exact(alternative="greater")``). Bins of one cell are still not
   independent, so the test alone over-calls on large ROIs; a row counts as above chance
   only when ``p < alpha`` **and** ``co_positive >= min_lift * expected``.
6. **Shape of the co-positive bins.** Spillover leaves in the receiving marker a small
   fraction of the source (a few percent at most: M +/- 1 well under 1 %, oxides about
   1-3 %, isotopic impurities up to a few %; common practice, from memory); markers that
   really share cells reach comparable levels. For each co-positive bin the ratio
   ``min(a', b') / max(a', b')`` of the background-subtracted means (background: the
   median of the marker's negative tissue bins) is taken; ``ratio`` is their median.

Flags
-----
* ``raw``: ``above-chance`` when above chance (definition 5).
* ``washed``: ``crosstalk-left`` when above chance and ``ratio <= spill_ratio`` (the
  co-positivity looks like spillover the wash did not remove); ``co-occur`` when above
  chance with a larger ratio (the markers share bins at comparable levels, which spillover
  cannot make: check the declaration; this is not a failure of the wash).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .errors import InputError
from .files import csv_text, read_csv_dicts
from .settings import setting

#: Columns of ``audit.csv`` (the contract's first seven, then the counts behind them).
AUDIT_COLUMNS = ("roi", "first", "second", "stage", "co_positive", "expected", "flags",
                 "first_marker", "second_marker", "n_bins", "n_first", "n_second",
                 "n_both", "lift", "p_value", "ratio")
AUDIT_FLAGS = ("above-chance", "crosstalk-left", "co-occur")
STAGES = ("raw", "washed")


@dataclasses.dataclass(frozen=True)
class AuditSettings:
    """The crosstalk audit (recipe section ``[audit]``)."""

    exclusive: tuple = setting(
        (), "pairs of mutually exclusive markers (tags or marker names), e.g. [[\"CD3\", \"CD20\"]]")
    alpha: float = setting(
        0.01, "significance level of the one-sided hypergeometric test of co-positive bins",
        low=0.0, low_open=True, high=0.5)
    block: int = setting(
        3, "edge in pixels of the square bins positivity is judged on", low=1, high=64)
    min_lift: float = setting(
        1.5, "above chance only when co-positivity is also at least this many times chance",
        low=1.0, high=1e6)
    spill_ratio: float = setting(
        0.1, "co-positive bins whose dimmer marker holds at most this fraction of the brighter "
        "one look like spillover", low=0.0, low_open=True, high=1.0)


def parse_exclusive(value, *, where) -> tuple[tuple[str, str], ...]:
    """Check ``[audit] exclusive`` as read from TOML: a list of pairs of two different names.

    Examples
    --------
    >>> parse_exclusive([["CD3", "CD20"]], where="recipe")
    (('CD3', 'CD20'),)
    """
    if not isinstance(value, (list, tuple)):
        raise InputError(where, f"audit.exclusive must be a list of pairs, e.g. [[\"A\", \"B\"]], got {value!r}")
    pairs = []
    for item in value:
        if (not isinstance(item, (list, tuple)) or len(item) != 2
                or not all(isinstance(n, str) and n.strip() for n in item)):
            raise InputError(where, f"audit.exclusive: each pair must be two names, got {item!r}")
        first, second = (n.strip() for n in item)
        if first == second:
            raise InputError(where, f"audit.exclusive: the pair [{first!r}, {second!r}] names the same marker twice")
        pairs.append((first, second))
    return tuple(pairs)


def resolve_pairs(pairs: Sequence[tuple[str, str]], channels: Sequence[str], labels: Sequence[str],
                  *, where) -> list[tuple[int, int]]:
    """Channel indices of each declared pair; names are tags first, else marker names.

    Raises
    ------
    InputError
        Naming every unknown (or ambiguous) name, or a pair whose two names are one channel.
    """
    channels, labels = list(channels), list(labels)

    def index(name):
        if name in channels:
            return channels.index(name)
        hits = [i for i, label in enumerate(labels) if label == name]
        return hits[0] if len(hits) == 1 else (None if not hits else -1)

    unknown = [n for pair in pairs for n in pair if index(n) is None]
    ambiguous = [n for pair in pairs for n in pair if index(n) == -1]
    if unknown:
        raise InputError(where, "audit.exclusive names marker(s) not in the ROI's channels or stain "
                         f"sheet: {', '.join(dict.fromkeys(unknown))}")
    if ambiguous:
        raise InputError(where, "audit.exclusive names marker(s) several channels carry (give the tag): "
                         f"{', '.join(dict.fromkeys(ambiguous))}")
    out = []
    for first, second in pairs:
        i, j = index(first), index(second)
        if i == j:
            raise InputError(where, f"audit.exclusive: the pair [{first!r}, {second!r}] names the same "
                             f"marker twice ({channels[i]})")
        out.append((i, j))
    return out


def bin_means(image, block: int) -> np.ndarray:
    """Means over ``block`` x ``block`` bins of a 2-D image (partial bins at the edges)."""
    image = np.asarray(image, np.float64)
    height, width = image.shape
    rows, cols = -(-height // block), -(-width // block)
    padded = np.zeros((rows * block, cols * block))
    padded[:height, :width] = image
    counts = np.zeros_like(padded)
    counts[:height, :width] = 1.0
    sums = padded.reshape(rows, block, cols, block).sum(axis=(1, 3))
    areas = counts.reshape(rows, block, cols, block).sum(axis=(1, 3))
    return sums / areas


def positive_bins(means: np.ndarray, tissue: np.ndarray) -> np.ndarray:
    """Bins clearly positive for one marker: above Otsu's threshold of log1p of the tissue
    bins' means (``skimage.filters.threshold_otsu``); only tissue bins can be positive."""
    from skimage.filters import threshold_otsu

    level = np.log1p(np.maximum(means, 0.0))
    inside = level[tissue]
    if inside.size == 0 or float(inside.max()) <= float(inside.min()):
        return np.zeros(means.shape, bool)
    return (level > threshold_otsu(inside)) & tissue


def co_positivity(first, second, *, tissue=None, settings: AuditSettings = AuditSettings()) -> dict:
    """Co-positivity of two markers in one stage (see the module notes for every definition).

    Parameters
    ----------
    first, second : array (Y, X)
        The two markers' images.
    tissue : array (Y, X) of bool, optional
        Where tissue lies (default: everywhere).
    settings : AuditSettings

    Returns
    -------
    dict
        ``co_positive``, ``expected`` (None without positives), ``n_bins``, ``n_first``,
        ``n_second``, ``n_both``, ``lift``, ``p_value``, ``ratio``, ``above_chance``,
        ``spill_shaped``, and the boolean bin masks ``mask_first``, ``mask_second``.

    Examples
    --------
    >>> a = np.zeros((30, 30)); a[:15] = 50
    >>> b = np.zeros((30, 30)); b[15:] = 50
    >>> r = co_positivity(a, b)
    >>> r["n_both"], r["above_chance"]
    (0, False)
    """
    block = settings.block
    mean_a, mean_b = bin_means(first, block), bin_means(second, block)
    if tissue is None:
        bins_tissue = np.ones(mean_a.shape, bool)
    else:
        bins_tissue = bin_means(np.asarray(tissue, np.float64), block) > 0.5
    pos_a, pos_b = positive_bins(mean_a, bins_tissue), positive_bins(mean_b, bins_tissue)
    n = int(bins_tissue.sum())
    n_a, n_b = int(pos_a.sum()), int(pos_b.sum())
    both = pos_a & pos_b
    n_ab = int(both.sum())
    result = {"n_bins": n, "n_first": n_a, "n_second": n_b, "n_both": n_ab, "co_positive": None,
              "expected": None, "lift": None, "p_value": None, "ratio": None,
              "above_chance": False, "spill_shaped": False, "mask_first": pos_a, "mask_second": pos_b}
    if n == 0 or n_a == 0 or n_b == 0:
        return result
    from scipy.stats import hypergeom

    co = n_ab / min(n_a, n_b)
    expected = max(n_a, n_b) / n
    p_value = float(hypergeom.sf(n_ab - 1, n, n_a, n_b))
    lift = co / expected if expected > 0 else math.inf
    ratio = None
    if n_ab:
        bg_a = float(np.median(mean_a[bins_tissue & ~pos_a])) if (bins_tissue & ~pos_a).any() else 0.0
        bg_b = float(np.median(mean_b[bins_tissue & ~pos_b])) if (bins_tissue & ~pos_b).any() else 0.0
        a = np.maximum(mean_a[both] - bg_a, 0.0)
        b = np.maximum(mean_b[both] - bg_b, 0.0)
        high = np.maximum(a, b)
        ratios = np.where(high > 0, np.minimum(a, b) / np.where(high > 0, high, 1.0), 0.0)
        ratio = float(np.median(ratios))
    above = p_value < settings.alpha and lift >= settings.min_lift
    result.update(co_positive=co, expected=expected, lift=lift, p_value=p_value, ratio=ratio,
                  above_chance=bool(above),
                  spill_shaped=bool(above and ratio is not None and ratio <= settings.spill_ratio))
    return result


def stage_flags(stage: str, measured: Mapping) -> list[str]:
    """The flags of one audit row (see the module notes)."""
    if not measured["above_chance"]:
        return []
    if stage == "raw":
        return ["above-chance"]
    return ["crosstalk-left"] if measured["spill_shaped"] else ["co-occur"]


def audit_tissue(stack, used=None) -> np.ndarray:
    """The tissue mask the audit uses: :func:`plexwash.qc.background.tissue_mask` of the raw
    stack's used channels, summed one plane at a time (a dask stack is never held whole)."""
    from .background import BackgroundSettings, tissue_mask

    n_channels = int(stack.shape[0])
    used = [True] * n_channels if used is None else list(used)
    total = np.zeros(tuple(int(s) for s in stack.shape[1:]), np.float64)
    for c in range(n_channels):
        if used[c]:
            total += np.asarray(stack[c], np.float64)
    # one summed plane with the glass rate scaled by the channel count is the same rule
    settings = BackgroundSettings()
    settings = dataclasses.replace(settings, glass_rate=settings.glass_rate * max(sum(used), 1))
    return tissue_mask(total[None], settings=settings)


def audit_roi(raw, washed, *, channels, labels=None, used=None, roi: str = "",
              settings: AuditSettings = AuditSettings(), where=None) -> list[dict]:
    """Audit rows of one ROI: every declared pair, raw then washed.

    Parameters
    ----------
    raw : array (C, Y, X)
        The raw stack (numpy or dask).
    washed : array (C, Y, X), mapping or None
        The washed stack, or a mapping of channel name -> washed plane holding at least the
        paired channels (None: raw rows only).
    channels, labels : sequence of str
        Tags and marker names (pairs may use either).
    used : sequence of bool, optional
        Channels summed into the tissue mask (the washed ones).
    roi : str
        The ROI's name in the rows.
    settings : AuditSettings
        ``exclusive`` pairs and the test's settings.
    where : str or Path, optional
        Where an unknown name is reported (the recipe).

    Returns
    -------
    list of dict
        One row per pair and stage with :data:`AUDIT_COLUMNS` (flags as a list).
    """
    labels = list(labels) if labels is not None else list(channels)
    pairs = resolve_pairs(settings.exclusive, channels, labels, where=where or "recipe")
    if not pairs:
        return []
    tissue = audit_tissue(raw, used)
    rows = []
    stages = [("raw", raw)] + ([("washed", washed)] if washed is not None else [])
    def plane(stack, index):
        key = channels[index] if isinstance(stack, Mapping) else index
        return np.asarray(stack[key])

    for i, j in pairs:
        for stage, stack in stages:
            measured = co_positivity(plane(stack, i), plane(stack, j), tissue=tissue,
                                     settings=settings)
            rows.append(audit_row(roi, channels[i], channels[j], stage, measured,
                                  labels=(labels[i], labels[j])))
    return rows


def audit_row(roi: str, first: str, second: str, stage: str, measured: Mapping, *,
              labels=None) -> dict:
    """One row of ``audit.csv`` from :func:`co_positivity`'s result."""
    labels = labels or (first, second)
    return {"roi": roi, "first": first, "second": second, "stage": stage,
            "co_positive": measured["co_positive"], "expected": measured["expected"],
            "flags": stage_flags(stage, measured), "first_marker": labels[0],
            "second_marker": labels[1], "n_bins": measured["n_bins"],
            "n_first": measured["n_first"], "n_second": measured["n_second"],
            "n_both": measured["n_both"], "lift": measured["lift"],
            "p_value": measured["p_value"], "ratio": measured["ratio"]}


def overlay(first, second, *, tissue=None, settings: AuditSettings = AuditSettings()) -> np.ndarray:
    """Pixel map of a pair's positivity (for a viewer): 0 neither, 1 first only, 2 second
    only, 3 both (co-positive), each bin's value spread over its pixels."""
    measured = co_positivity(first, second, tissue=tissue, settings=settings)
    codes = measured["mask_first"].astype(np.uint8) + 2 * measured["mask_second"].astype(np.uint8)
    block = settings.block
    full = np.repeat(np.repeat(codes, block, axis=0), block, axis=1)
    height, width = np.asarray(first).shape
    return full[:height, :width]


# --------------------------------------------------------------------------- audit.csv

AUDIT = "audit.csv"


def audit_csv_text(rows: Sequence[Mapping]) -> str:
    """Audit rows as CSV text (:data:`AUDIT_COLUMNS`; flags joined by ``;``)."""
    return csv_text(AUDIT_COLUMNS, rows)



def write_audit_table(out_dir) -> Path | None:
    """Write ``audit.csv`` of a run folder from its ledger (each done ROI's latest rows),
    atomically; None when no record holds audit rows (an ``audit.csv`` an earlier run wrote
    is then removed: the pairs are no longer declared, and a stale table would mislead)."""
    from .files import check_output, remove_path, write_atomic, written_by_plexwash
    from .ledger import latest_records, read_ledger

    latest = latest_records(read_ledger(out_dir))
    rows = [row for name in sorted(latest) if latest[name].get("status") == "done"
            for row in latest[name].get("audit") or []]
    if not rows:
        stale = Path(out_dir) / AUDIT
        if stale.is_file() and written_by_plexwash(stale):
            remove_path(stale)
        return None
    path = check_output(Path(out_dir) / AUDIT, kind="csv")
    write_atomic(path, audit_csv_text(rows))
    return path


def read_audit_csv(path) -> list[dict]:
    """Read ``audit.csv`` back (numbers as float or int, flags as lists)."""
    rows = read_csv_dicts(path)
    out = []
    for row in rows:
        parsed = dict(row)
        parsed["flags"] = [f for f in (row.get("flags") or "").split(";") if f]
        for key in ("co_positive", "expected", "lift", "p_value", "ratio"):
            parsed[key] = float(row[key]) if row.get(key) else None
        for key in ("n_bins", "n_first", "n_second", "n_both"):
            parsed[key] = int(row[key]) if row.get(key) else None
        out.append(parsed)
    return out


def audit_washed(roi, washed, recipe) -> list[dict]:
    """Audit rows of one ROI of a run: its raw stack and its washed stack.

    ``washed`` is the washed stack at hand (an array or array store, e.g. the staging file)
    or the written file's path; only the paired channels are read from it.
    """
    if not recipe.audit.exclusive:
        return []
    if isinstance(washed, (str, Path)):
        from .io import read_roi

        washed = read_roi(washed).data
    names = pair_channels(roi, recipe.audit, where=recipe.source)
    planes = {name: np.asarray(washed[roi.channels.index(name)]) for name in names}
    return audit_roi(roi.data, planes, channels=roi.channels, labels=roi.labels, used=roi.use,
                     roi=roi.name, settings=recipe.audit, where=recipe.source)


def pair_channels(roi, settings: AuditSettings, *, where=None) -> list[str]:
    """The tags of every channel named by the declared pairs, in first-named order."""
    pairs = resolve_pairs(settings.exclusive, roi.channels, roi.labels, where=where or "recipe")
    return list(dict.fromkeys(roi.channels[k] for pair in pairs for k in pair))


def audit_one(roi, recipe, *, spillover=None) -> list[dict]:
    """Audit rows of one ROI washed in memory (``plexwash inspect``, the studio): only the
    paired channels are washed (:func:`plexwash.qc.wash` with ``channels``, bit for bit as
    in the full wash)."""
    if not recipe.audit.exclusive:
        return []
    from .wash import wash

    names = pair_channels(roi, recipe.audit, where=recipe.source)
    washed = wash(roi, recipe, spillover=spillover, channels=names)
    planes = {name: washed.data[k] for k, name in enumerate(washed.channels)}
    return audit_roi(roi.data, planes, channels=roi.channels, labels=roi.labels, used=roi.use,
                     roi=roi.name, settings=recipe.audit, where=recipe.source)


def format_audit(rows: Sequence[Mapping]) -> str:
    """A readable table of audit rows (``plexwash inspect``)."""
    header = ("first", "second", "stage", "co-positive", "expected", "lift", "p", "ratio", "flags")

    def num(value, fmt):
        return "" if value is None else format(value, fmt)

    table = [(r["first"], r["second"], r["stage"], num(r["co_positive"], ".3f"),
              num(r["expected"], ".3f"), num(r["lift"], ".2f"), num(r["p_value"], ".2g"),
              num(r["ratio"], ".3f"), ",".join(r["flags"]) or "ok") for r in rows]
    widths = [max(len(str(t[i])) for t in [header, *table]) for i in range(len(header))]
    lines = ["Crosstalk audit (co-positive: share of the rarer marker's positive bins that are "
             "also positive for the other; expected: the same by chance)"]
    lines.append("  ".join(h.ljust(w) for h, w in zip(header, widths, strict=True)))
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(str(v).ljust(w) for v, w in zip(t, widths, strict=True)) for t in table]
    return "\n".join(lines)


def audit_pair(roi, recipe, first: str, second: str, *, spillover=None) -> dict:
    """One pair of one ROI for a viewer: its audit rows and the washed images behind them.

    Returns
    -------
    dict
        ``rows`` (raw and washed, as in ``audit.csv``), ``first`` and ``second`` (the washed
        (Y, X) planes), ``overlay`` (Y, X) uint8 codes at the washed stage (0 neither, 1 first
        only, 2 second only, 3 co-positive; see :func:`overlay`).
    """
    from .wash import wash

    settings = dataclasses.replace(recipe.audit, exclusive=((first, second),))
    (i, j), = resolve_pairs(settings.exclusive, roi.channels, roi.labels, where="audit pair")
    washed = wash(roi, recipe, spillover=spillover, channels=[roi.channels[i], roi.channels[j]])
    planes = {name: np.asarray(washed.data[k]) for k, name in enumerate(washed.channels)}
    rows = audit_roi(roi.data, planes, channels=roi.channels, labels=roi.labels, used=roi.use,
                     roi=roi.name, settings=settings)
    a, b = planes[roi.channels[i]], planes[roi.channels[j]]
    tissue = audit_tissue(roi.data, roi.use)
    return {"rows": rows, "first": a, "second": b,
            "overlay": overlay(a, b, tissue=tissue, settings=settings)}
