"""The statistical tests of the speckle step, and their thresholds as tables for the kernel.

Density test
    Binomial test on a window's positive neighbours: a positive pixel whose ``n`` positive
    neighbours (of ``m``) have ``P(N >= n) < alpha`` under ``N ~ Binomial(m, p)`` is dense
    (an exact one-sided binomial test; ``P(N >= n)`` is the regularised incomplete beta
    function, Abramowitz & Stegun 26.5.24, via ``scipy.special.bdtrc``). ``p`` is the
    background's positive rate *where the pixel lies*.
Value test
    Poisson upper tail: a pixel whose value ``v`` has ``P(Y >= v) < value_alpha`` under
    ``Y ~ Poisson(lambda)`` is too bright for background (``P(Y >= v)`` is the regularised
    lower incomplete gamma function, Abramowitz & Stegun 6.5.2 and 26.4.21, via
    ``scipy.special.pdtrc``).
Low against the neighbours
    Lower Poisson tail against the neighbourhood: a dense pixel of value ``v`` with
    ``P(Y <= v) < edge_alpha`` under ``Y ~ Poisson(mu)``, ``mu`` the mean of its 8
    neighbours, cannot belong to the structure it touches (a one-count pixel beside a cell
    of thirty counts a pixel); it is not kept by density, so background counts on the rim
    of bright cells go while dim cells and thin fibres, whose neighbours are dim too, stay.
    ``P(Y <= v)`` is the regularised upper incomplete gamma function ``Q(v + 1, mu)``
    (Abramowitz & Stegun 6.5.2, 26.4.19), so the rule is ``mu > Q^-1(v + 1, edge_alpha)``
    (:func:`low_mean_table`, ``scipy.special.gammainccinv``).
Line test
    Poisson test on the summed whole counts of the dim positive pixels of a line of
    ``2 * line_half`` pixels through a positive pixel, in 16 orientations and the phases a
    digital line can take, at ``line_alpha / T`` for ``T`` such lines (Bonferroni over the
    lines): a thin fibre puts most of its pixels on one of the lines, where a square window
    dilutes them among background, and summing its counts keeps what a fibre of 1-4 counts
    per pixel carries (counting its positive pixels, a binomial test, throws that away).
    Each half of the line must pass the same test on its own at ``line_side_alpha``, and the
    line must be denser than each parallel line ``flank_distance`` pixels across it
    (conditional test of two Poisson means, Przyborowski & Wilenski 1940, at
    ``flank_alpha``): a background pixel beside a cell, between two cells or past a fibre's
    end fails those (:func:`line_sum_tables`, :func:`line_flank_table`, kernel
    ``line_sum_dense``).
Lone pixels
    Poisson upper tail at ``lone_alpha`` (1e-12, about ``value_alpha`` over a million
    pixels, Bonferroni): a pixel this bright is kept even when it is alone, so a one-pixel
    speck of real stain survives the component-size rule (:func:`lone_cuts`).
Residue of removed spillover
    One-sided Poisson test of the counts compensation left: see :func:`drop_residue`.
Background rate
    Under background alone a window's centre is positive with probability ``p`` whatever
    its neighbours are, so the fraction of positive centres among windows with few positive
    neighbours is the conditional maximum-likelihood estimate of ``p`` (:func:`fit_rate`).
    With a background context (:class:`plexwash.qc.background_context.BackgroundContext`) the fit
    is made per region, glass and tissue, over windows centred in that region; the rate of
    a pixel is its region's rate times the shared variation of background there, rounded to
    the context's zone (4.4 % steps), and the thresholds of both tests are tabulated per
    zone (:func:`zone_tables`).
"""

from __future__ import annotations

import functools

import numpy as np
from plexwash.qc.steps import _search_kernels as _sk  # absolute: one numba cache
from scipy import special

from .._tail_search import tail_below
from ..errors import InputError
from ._speckle_search import (
    _min_count_tables,
    _rate_tables,
    binomial_min_count,
    min_count_table,
    poisson_level,
    poisson_min_value,
    poisson_min_values,
)

__all__ = [
    "FIT_START_QUANTILE",
    "FIT_UPPER_TAIL",
    "MIN_REGION_WINDOWS",
    "binomial_min_count",
    "binomial_upper_point",
    "box3",
    "drop_residue",
    "filter_parameters",
    "fit_rate",
    "LINE_ORIENTATIONS",
    "LINE_PHASES",
    "line_flank_table",
    "line_offsets",
    "line_sum_tables",
    "lone_cuts",
    "low_mean_table",
    "min_count_table",
    "poisson_level",
    "poisson_min_value",
    "poisson_min_values",
    "positive_rate",
    "tabulated_levels",
    "zone_tables",
]

#: Quantile of all neighbour counts where the background fit starts.
FIT_START_QUANTILE = 0.01
#: The background fit uses windows with up to the (1 - this) point of Binomial(m, p) positive
#: neighbours: 0.5, the median, keeps windows centred in cells out.
FIT_UPPER_TAIL = 0.5
#: A region whose rate is fitted on its own needs at least this many full windows centred in
#: it; a smaller one takes the rate of the whole channel.
MIN_REGION_WINDOWS = 2000


def fit_rate(histogram: np.ndarray, *, lowest: int = 0) -> float:
    """Background positive rate from ``histogram[centre positive, n]`` (windows by their ``n``).

    ``p`` is the fraction of positive centres among windows with ``lowest <= n <= K``,
    ``K`` the median of ``Binomial(m, p)``, iterated to a fixed point from the 1 % quantile
    of all ``n``: windows centred in cells have large ``n`` and stay out, windows grazing a
    cell have background centres and do not bias it. Under background alone the centre is
    positive with probability ``p`` whatever ``n`` is, so leaving out windows with no
    positive neighbour (``lowest = 1``) keeps the estimate unbiased, and stops empty areas
    (glass left in a region, counts compensation set to 0, dips of the background) from
    pulling it down.
    """
    histogram = np.asarray(histogram, np.float64)
    neighbours = histogram.shape[1] - 1
    cumulative = np.cumsum(histogram.sum(axis=0))
    if cumulative[-1] == 0:
        raise InputError("image", "no window lies wholly inside the image")
    if histogram[:, lowest:].sum() == 0:
        lowest = 0
    upper = max(int(np.searchsorted(cumulative, FIT_START_QUANTILE * cumulative[-1])), lowest)
    seen = set()
    rate = 0.0
    while upper not in seen:
        seen.add(upper)
        positive = histogram[1, lowest: upper + 1].sum()
        negative = histogram[0, lowest: upper + 1].sum()
        if positive + negative == 0:
            upper += 1
            continue
        rate = float(positive / (positive + negative))
        upper = max(binomial_upper_point(neighbours, rate, FIT_UPPER_TAIL), lowest)
    return rate


def binomial_upper_point(trials: int, rate: float, tail: float) -> int:
    """Smallest ``k`` with ``P(N > k) <= tail``, ``N ~ Binomial(trials, rate)`` (scipy's ``isf``)."""
    survival = special.bdtrc(np.arange(trials + 1), trials, rate)  # P(N > k)
    return int(np.argmax(survival <= tail))


def positive_rate(level, threshold: float) -> np.ndarray:
    """``P(Y > threshold)`` for ``Y ~ Poisson(level)`` (the inverse of :func:`poisson_level`)."""
    level = np.asarray(level, np.float64)
    return np.where(level > 0, special.gammainc(np.floor(threshold) + 1.0, np.maximum(level, 1e-300)),
                    0.0)


def zone_tables(levels: np.ndarray, *, rates=None, threshold: float, radius: int, alpha: float,
                value_alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds of both tests for each zone's background level (counts per pixel).

    Returns ``min_count`` (Z, 2r+2, 2r+2) int32 (:func:`min_count_table` at each zone's
    positive rate: ``rates`` when given, else :func:`positive_rate` of the level) and
    ``value_cut`` (Z,) float64 (a positive pixel above it is kept by value:
    :func:`poisson_min_value` - 1). Equal levels are tabulated once.
    """
    levels = np.asarray(levels, np.float64)
    if rates is not None:  # one zone, its rate as fitted
        rates = np.asarray(rates, np.float64)
        tables = min_count_table(radius, rates, alpha)
        cuts = poisson_min_values(levels, value_alpha) - 1.0
        return tables, cuts
    distinct, index = np.unique(levels, return_inverse=True)
    rates = positive_rate(distinct, threshold)
    tables = min_count_table(radius, rates, alpha)
    cuts = poisson_min_values(distinct, value_alpha) - 1.0
    # a zone whose every pixel is positive (rate 1): nothing is sparser than background
    tables[rates >= 1.0] = 0
    cuts[rates >= 1.0] = -np.inf
    return tables[index.ravel()], cuts[index.ravel()]


#: Whole values up to which :func:`low_mean_table` is tabulated (brighter pixels are never low).
LOW_VALUES = 255


@functools.lru_cache(maxsize=16)
def low_mean_table(edge_alpha: float) -> np.ndarray:
    """``table[v]``: the neighbour mean above which a pixel of value ``v`` (whole counts, floor)
    is improbably low, ``P(Y <= v) < edge_alpha`` for ``Y ~ Poisson(mean)``; ``inf`` when off.

    Depends on ``edge_alpha`` alone: computed once per value and shared (read-only)."""
    values = np.arange(LOW_VALUES + 1, dtype=np.float64)
    table = np.full(values.shape, np.inf) if edge_alpha <= 0.0 else special.gammainccinv(values + 1.0, edge_alpha)
    table.flags.writeable = False
    return table


def tabulated_levels(levels: np.ndarray, zone) -> np.ndarray:
    """``levels`` (one per zone code) with the codes absent from the ``zone`` map set to the level
    of the first code present, so the tables indexed by zone (read only at the map's codes) are
    searched for the levels that occur: a small ROI has a few of the 256 codes. ``levels``
    itself when ``zone`` is None or every code occurs."""
    if zone is None:
        return levels
    present = np.zeros(len(levels), np.bool_)
    _sk.zone_presence(np.ascontiguousarray(zone, np.uint8), present)
    if present.all() or not present.any():
        return levels
    return np.where(present, levels, levels[np.argmax(present)])


def drop_residue(image: np.ndarray, spilled: np.ndarray, background: np.ndarray, alpha: float) -> np.ndarray:
    """A compensated channel with the residue of removed spillover set to 0 (one-sided Poisson test).

    Compensation removed ``g = spilled`` from the channel: the spillover it expects there.
    Where ``g`` is at least the local background ``b`` (counts per pixel), the counts left
    in a pixel are kept only when the measured whole counts ``Y`` (``image + g``, rounded)
    of its 3 x 3 window are improbable without any own signal, ``P(N >= Y) < alpha`` for
    ``N ~ Poisson`` of the window's sum of ``g + b`` (exact Poisson upper tail, the
    regularised lower incomplete gamma ``P(Y, mu)``, Abramowitz & Stegun 6.5.2 and 26.4.21);
    otherwise they are the positive half of the ghost's counting noise that NNLS leaves on
    Poisson counts, and become 0. The window is clipped at the array's edge. Returns
    ``image`` itself when nothing is set to 0.
    """
    image = np.asarray(image, np.float32)
    spilled = np.asarray(spilled, np.float32)
    candidates = (image > 0) & (spilled > 0) & (spilled >= background)
    if not candidates.any():
        return image
    measured = box3(np.floor(image.astype(np.float64) + spilled + 0.5))
    expected = box3(spilled.astype(np.float64) + background)
    tail = special.gammainc(np.maximum(measured[candidates], 1.0), np.maximum(expected[candidates], 1e-300))
    residue = np.zeros(image.shape, bool)
    residue[candidates] = tail >= alpha
    if not residue.any():
        return image
    return np.where(residue, np.float32(0.0), image)


def box3(values: np.ndarray) -> np.ndarray:
    """Sum over the 3 x 3 window of each pixel of a plane (clipped at the edges), float64."""
    padded = np.pad(np.asarray(values, np.float64), 1)
    height, width = values.shape
    total = np.zeros(values.shape, np.float64)
    for dy in range(3):
        for dx in range(3):
            total += padded[dy:dy + height, dx:dx + width]
    return total


#: Orientations of the line test: every 22.5 degrees, so a fibre at any angle lies within
#: 11.25 degrees of one of them.
LINE_ORIENTATIONS = 16
#: Where between grid rows a line may pass the centre pixel (fractions of a pixel): a
#: digital line of slope 1/2 has different pixel patterns for different phases.
LINE_PHASES = (-0.375, -0.125, 0.125, 0.375)


@functools.lru_cache(maxsize=8)
def line_offsets(half: int) -> np.ndarray:
    """(T, 2 * half, 2) int64: the pixels of each line through a pixel (``half`` ahead, then behind).

    For every orientation ``o * 180 / O`` degrees and phase ``c`` of :data:`LINE_PHASES`,
    the line steps one pixel along its major axis and takes, at step ``k``, the nearest
    pixel across it, ``round(k * slope + c)`` (a digital straight line, Bresenham 1965,
    through the centre pixel). Lines with the same pixels are listed once: the axes and
    diagonals have one pattern, the slopes of 1/2 and 2 several.
    """
    templates = []
    for o in range(LINE_ORIENTATIONS):
        angle = np.pi * o / LINE_ORIENTATIONS
        dy, dx = np.sin(angle), np.cos(angle)
        steep = abs(dy) > abs(dx)
        slope = dx / dy if steep else dy / dx
        sign = np.sign(dy) if steep else np.sign(dx)
        for phase in LINE_PHASES:
            pixels = []
            for k in list(range(1, half + 1)) + list(range(-1, -half - 1, -1)):
                across = int(np.floor(k * slope + phase + 0.5))
                along = int(sign * k)
                pixels.append((along, across) if steep else (across, along))
            if pixels not in templates:
                templates.append(pixels)
    offsets = np.array(templates, np.int64).reshape(len(templates), 2 * half, 2)
    offsets.flags.writeable = False  # cached: shared by every call
    return offsets


def lone_cuts(levels: np.ndarray, settings) -> np.ndarray:
    """Per zone, the value above which a pixel is kept even alone (``lone_alpha``; inf: off).

    Judged against the densest background of the channel (its highest finite zone level),
    not the pixel's own zone: a region with few counts can have its level estimated as 0,
    where every count would look improbable, and a lone pixel is kept only when no
    background of the ROI explains it.
    """
    levels = np.asarray(levels, np.float64)
    if settings.lone_alpha <= 0:
        return np.full(len(levels), np.inf)
    finite = levels[np.isfinite(levels)]  # an infinite zone keeps every pixel anyway
    cut = poisson_min_value(float(np.max(finite, initial=0.0)), settings.lone_alpha) - 1.0
    return np.full(len(levels), cut, np.float64)


def rim_tables(levels: np.ndarray, rates, settings) -> np.ndarray:
    """``table[z, m]``: smallest dim positive count among ``m`` neighbours kept by the rim rule.

    Exact one-sided binomial test at ``rim_alpha`` (the density test of Ester et al. 1996 on
    the neighbours that are not bright): a pixel on the rim of a bright cell is dense only when
    its window is dense without the cell. Shape ``(Z, 0)`` when ``rim_alpha`` is 0 (off).
    """
    levels = np.asarray(levels, np.float64)
    if settings.rim_alpha <= 0:
        return np.zeros((len(levels), 0), np.int32)
    if rates is None:
        rates = positive_rate(levels, settings.threshold)
    rates = np.asarray(rates, np.float64)
    trials = np.arange((2 * int(settings.radius) + 1) ** 2)
    table = _rate_tables(trials, rates, settings.rim_alpha).astype(np.int32)
    table[rates >= 1.0] = 0
    return np.ascontiguousarray(table)


def rim_values(levels: np.ndarray, settings) -> np.ndarray:
    """Per zone, the highest value the rim rule judges: values whose Poisson upper tail under the
    zone's level is at least ``rim_alpha`` (consistent with background); brighter pixels of a cell's
    edge are never judged."""
    levels = np.asarray(levels, np.float64)
    if settings.rim_alpha <= 0:
        return np.full(len(levels), -np.inf)
    return poisson_min_values(levels, settings.rim_alpha) - 1.0


def without_residue(image, spilled, zone, levels: np.ndarray, alpha: float):
    """``image`` with the residue of removed spillover set to 0 (:func:`drop_residue` against the
    background ``levels[zone]``, or ``levels[0]`` everywhere without a zone map), or ``image``
    itself when there is nothing to test (no ``spilled``, or ``alpha`` 0) or nothing is set to 0.

    The same test as :func:`drop_residue` with the window sums made by a compiled loop, only at
    the pixels tested, in ``box3``'s order of additions (so the same sums), and the incomplete
    gamma function evaluated only where the bounds of :func:`plexwash.qc._tail_search.tail_below`
    leave the answer within rounding of ``alpha``."""
    if spilled is None or alpha <= 0:
        return image
    image = np.asarray(image, np.float32)
    spilled = np.ascontiguousarray(spilled, np.float32)
    levels = np.nan_to_num(np.asarray(levels, np.float64), posinf=1e30)
    if zone is None:
        zone, levels = np.zeros(image.shape, np.uint8), levels[:1]
    measured, expected = np.empty(image.size, np.float64), np.empty(image.size, np.float64)
    where = np.empty(image.size, np.int64)
    found = _sk.residue_candidates(np.ascontiguousarray(image), spilled, np.ascontiguousarray(zone, np.uint8),
                                  np.ascontiguousarray(levels), measured, expected, where)
    if found == 0:
        return image
    # residue: tail >= alpha, the tail computed only where exact bounds on it do not decide
    whole, mean = np.maximum(measured[:found], 1.0), expected[:found]
    if alpha < 0.49:  # whole n <= mean: P(N >= n) > 1/2 (a Poisson median is >= mean - ln 2, Choi 1994)
        above = np.flatnonzero(whole > mean)
        kept = above[tail_below(whole[above], mean[above], alpha, _residue_tail)]
        residue = np.delete(where[:found], kept)
    else:
        residue = where[:found][~tail_below(whole, mean, alpha, _residue_tail)]
    if residue.size == 0:
        return image
    out = np.array(image, np.float32, order="C")
    out.reshape(-1)[residue] = np.float32(0.0)
    return out


def _residue_tail(measured: np.ndarray, expected: np.ndarray) -> np.ndarray:
    """The Poisson upper tail :func:`drop_residue` tests, ``P(N >= measured)`` for ``N ~ Poisson(expected)``."""
    return special.gammainc(np.maximum(measured, 1.0), np.maximum(expected, 1e-300))


def line_sum_tables(levels: np.ndarray, settings) -> np.ndarray:
    """``table[z, 0, t]``: smallest sum of dim counts on a line of ``t`` pixels kept in zone ``z``;
    ``table[z, 1, h]``: smallest sum on each of its halves of ``h`` pixels.

    The line: exact one-sided Poisson test of its summed whole counts against its background
    mean ``t * level[z]`` (``P(S >= s)``, the regularised lower incomplete gamma function,
    Abramowitz & Stegun 6.5.2 and 26.4.21, via :func:`poisson_min_values`), at
    ``line_alpha / T`` for the ``T`` lines of :func:`line_offsets`: Bonferroni over the lines
    (Bonferroni 1936), so a background pixel is kept by some line with probability at most
    ``line_alpha``. Summing the counts, not counting positive pixels, uses what a fibre of
    1-4 counts per pixel carries (a binomial count of positives throws it away). Each half:
    the same test at ``line_side_alpha`` (1: off), a condition that only makes the line test
    stricter (a background pixel beside a cell or past a fibre's end has a half of
    background). Leaving out the bright pixels (above the value test's cut) only lowers a
    background line's sum, so the tests stay conservative. A zone whose level is above
    ``line_max_level`` is not tested (every entry :data:`NO_LINE`: no line reaches it); one
    whose level is infinite (every pixel positive) keeps every pixel: 0.
    """
    levels = np.asarray(levels, np.float64)
    half = int(settings.line_half)
    tests = len(line_offsets(half)) if half > 0 else 1
    trials = np.arange(2 * half + 1, dtype=np.float64)
    finite = np.isfinite(levels)
    table = np.zeros((len(levels), 2, trials.size), np.int32)
    tested = finite & (levels <= settings.line_max_level)  # the others are NO_LINE: not searched
    # each zone's row depends on its level alone: searched once per distinct level
    distinct, at = np.unique(levels[tested], return_inverse=True)
    means = trials[None, :] * distinct[:, None]
    table[tested, 0] = poisson_min_values(means, settings.line_alpha / tests).astype(np.int32)[at.ravel()]
    if settings.line_side_alpha < 1.0:
        table[tested, 1] = poisson_min_values(means, settings.line_side_alpha).astype(np.int32)[at.ravel()]
    table[finite & ~tested] = NO_LINE
    return table


#: A line-table entry no line's sum reaches (the line test is not asked there).
NO_LINE = np.iinfo(np.int32).max


#: Largest whole-count total of a line and a flank the flank test is tabulated for (a
#: brighter pair is a cell's, not a dim fibre's: the line test then fails).
FLANK_TOTAL = 255


@functools.lru_cache(maxsize=8)
def line_flank_table(half: int, alpha: float) -> np.ndarray:
    """``table[t, f, n]``: smallest whole-count sum on a line of ``t`` pixels that is improbably
    high against a parallel line of ``f`` pixels when the two hold ``n`` counts together.

    Conditional test of two Poisson means (Przyborowski & Wilenski 1940, the "C-test"):
    under equal rates, given the total ``n`` the line's share is ``Binomial(n, t / (t + f))``;
    exact one-sided binomial upper tail at ``alpha`` (``scipy.special.bdtrc``). A fibre is
    denser than the background beside it on both sides; a line along the edge of a cell,
    or across two cells, is not. Shape (0, 0, 0) when off (``alpha`` or ``half`` 0).
    """
    if alpha <= 0 or half <= 0:
        return np.zeros((0, 0, 0), np.int32)
    t = np.arange(2 * half + 1)[:, None, None]
    f = np.arange(2 * half + 1)[None, :, None]
    n = np.arange(FLANK_TOTAL + 1)[None, None, :]
    share = np.where(t + f > 0, t / np.maximum(t + f, 1), 1.0)
    trials, share = np.broadcast_arrays(n, share)
    table = binomial_min_count(trials, share, alpha).astype(np.int32)
    table.flags.writeable = False  # cached: shared by every call
    return table


def filter_parameters(settings, background, zone=None) -> dict:
    """Everything the speckle kernel needs besides the pixels: every table of this module for
    ``settings`` (a ``SpeckleSettings``) and the channel's ``background`` (a
    ``speckle.BackgroundEstimate``). With the ``zone`` map, the zone tables are searched only
    for the codes it holds.

    Every zone's row of every table depends on its level alone, so the rows are made once per
    distinct level and repeated (:func:`_level_tables`); the same entries as each table's own
    function gives on every zone (tested)."""
    zoned = background.zone_levels is not None
    if zoned:
        levels, rates = background.zone_levels, None
    else:
        levels, rates = np.array([background.level]), np.array([background.rate])
    tabled = tabulated_levels(levels, zone) if zoned else levels
    distinct, at = np.unique(tabled, return_inverse=True)
    rows = _level_tables(distinct, rates, settings)
    wide_radius = int(settings.wide_radius)
    return {
        "threshold": np.float32(settings.threshold),
        "radius": int(settings.radius),
        "min_count": rows["min_count"][at.ravel()],
        "wide_radius": wide_radius,
        "wide_upper": float(poisson_min_value(float(np.max(levels[np.isfinite(levels)], initial=0.0)),
                                              settings.value_alpha) - 1.0),
        "wide_min_count": rows["wide_min_count"][at.ravel()],
        "support_min_count": rows["support_min_count"][at.ravel()],
        "value_cut": rows["value_cut"][at.ravel()],
        "low_mean": low_mean_table(float(settings.edge_alpha)),
        "min_area": int(settings.min_area),
        "lone_cut": lone_cuts(levels, settings),
        "line_half": int(settings.line_half),
        "line_min_count": rows["line_min_count"][at.ravel()],
        "line_flank": int(settings.flank_distance),
        "line_extend": int(settings.line_extend),
        "line_flank_min": line_flank_table(int(settings.line_half), float(settings.flank_alpha)),
        "rim_min_count": np.ascontiguousarray(rows["rim_min_count"][at.ravel()]),
        "rim_value": rows["rim_value"][at.ravel()],
        "pass_through": bool(np.all(np.isinf(levels))) or (not zoned and background.rate >= 1.0),
        "keep_touching": bool(settings.keep_touching),
        "zoned": zoned,
        "levels": np.asarray(levels, np.float64),
    }


def _level_tables(levels: np.ndarray, rates, settings) -> dict:
    """The rows of the zone tables for each of ``levels`` (``rates``: the fitted rate of a single
    level, or None for the levels' positive rates), as :func:`zone_tables` (window, support and
    wide), :func:`line_sum_tables`, :func:`rim_tables` and :func:`rim_values` make them; the
    binomial searches at one alpha share one grid over all the neighbour counts asked."""
    radius, wide_radius = int(settings.radius), int(settings.wide_radius)
    given = rates is not None
    rates = np.asarray(rates, np.float64) if given else positive_rate(levels, settings.threshold)
    requests = [(radius, settings.alpha)]
    if wide_radius > 0:
        requests += [(radius, settings.support_alpha), (wide_radius, settings.alpha)]
    tables = _min_count_tables(requests, rates, (2 * radius + 1) ** 2 if settings.rim_alpha > 0 else 0,
                               settings.rim_alpha)
    cuts = poisson_min_values(levels, settings.value_alpha) - 1.0
    saturated = rates >= 1.0
    if not given:  # a zone whose every pixel is positive (rate 1): nothing is sparser than background
        for table in tables[:-1]:
            table[saturated] = 0
        cuts[saturated] = -np.inf
    min_count = tables[0]
    if wide_radius > 0:
        support, wide = tables[1], tables[2]
    else:  # never: more neighbours than any window has
        support = np.full_like(min_count, np.iinfo(np.int32).max)
        wide = np.full((min_count.shape[0], 2, 2), np.iinfo(np.int32).max, np.int32)
    rim = tables[-1]
    if settings.rim_alpha > 0:
        rim[saturated] = 0
    return {"min_count": min_count, "support_min_count": support, "wide_min_count": wide, "value_cut": cuts,
            "line_min_count": line_sum_tables(levels, settings), "rim_min_count": rim,
            "rim_value": rim_values(levels, settings)}
