"""The ``striped`` test: rows or columns that drop out, with a Poisson significance level.

A line drop-out (a detector or stage fault) scales every count of one or two rows (or
columns) down, in every channel, background included. A line is striped when its counts
drop significantly against the lines beside it where the tissue is quiet:

- **Which pixels**: those of the line whose lines two away on both sides are quiet in every
  channel (:func:`loud_pixels`: no count above the channel's background level, so no cell
  of any stain), whose lines beside it hold no bright pixel in any channel, and that lie
  away from the tissue's edge (where the edge runs along a line for a stretch, as a rounded
  piece does at its extremes, glass beside tissue would read as a drop).
- **The test** (:func:`drop_pvalues`): the line's counts ``A`` in those pixels, summed
  over the channels' spike-free copies (a drop-out lowers every channel; a sum of Poisson
  counts is Poisson), against the counts ``B`` of the two lines beside it at the same
  pixels. The choice of pixels does not look at the line itself, so under the null (no
  drop) ``A`` is Poisson with mean ``lam``; looking at the lines beside it only removes
  their bright pixels, which can only lower ``B`` below its Poisson mean ``2 lam``, so the
  test errs towards silence. Conditional on ``n = A + B``, ``A`` is binomial ``(n, 1/3)``:
  the exact conditional test for comparing two Poisson counts (Przyborowski & Wilenski,
  *Biometrika* 31, 1940; reference ``scipy.stats.binomtest(A, n, 1/3,
  alternative="less")``). The line is striped when ``P(X <= A) < stripe_alpha``, its ratio
  ``2 A / B`` is below ``1 - stripe_drop``, and no part of the line (:func:`line_parts`)
  holds significantly more counts than such a drop would leave (a drop-out spans the line;
  a gap between cells that happen to line up does not).

Silent on low-count ROIs without drop-outs (chance dips are not significant) and where a
gap between rows of cells spans a line (cells and membranes beside it are loud or bright
and left out; in the quiet pixels a gap holds as many counts as its neighbours). Power
needs counts: on small ROIs densely packed with cells (few quiet pixels) a drop-out line
may miss the level while its neighbour drop-out lines are found. The first and last lines
(one neighbour only) are not judged.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import special

from ._kernels import mark_levels, quiet_sums, values_at_most
from .order import percentile
from .settings import QualitySettings

#: Probability of a line's counts under the null (no drop): one line against two.
NULL_SHARE = 1.0 / 3.0


#: Chance of a background count this high or higher, per pixel and channel: at or above
#: it a pixel is loud; at or above the second, bright (:func:`loud_pixels`).
LOUD_TAIL = 1e-3
BRIGHT_TAIL = 1e-6


def loud_pixels(plane: np.ndarray, memo: dict | None = None) -> np.ndarray:
    """(Y, X) int8: 1 where a pixel of one channel is above its background level, 2 where
    it is far above it (bright), else 0.

    The levels are the smallest counts ``k >= 2`` (``k >= 4``) with ``P(N >= k) <
    LOUD_TAIL`` (``BRIGHT_TAIL``) for ``N`` Poisson with the mean of the channel's lower
    half of values (its background where the stain covers less than half of the ROI;
    ``scipy.stats.poisson.isf``). ``memo``: as for :func:`.order.percentile` (the channel's
    99th percentile is selected with its median, for the channel's own measurement).

    Examples
    --------
    >>> loud_pixels(np.array([[0, 0, 0, 0, 0, 1, 2, 5]])).tolist()
    [[0, 0, 0, 0, 0, 0, 1, 2]]
    """
    plane = np.asarray(plane)
    median = percentile(plane, 50.0, memo=memo, also=(99.0,))
    if plane.ndim == 2 and plane.dtype in (np.float32, np.uint8, np.uint16):
        # plane[plane <= median] in one compiled pass, without the mask (the same values in
        # the same order, so the same mean)
        low = np.empty(plane.size, plane.dtype)
        low = low[:values_at_most(np.ascontiguousarray(plane), float(median), low)]
    else:
        low = plane[plane <= median]
    rate = float(low.mean()) if low.size else 0.0
    loud, bright = 2.0, 4.0
    if rate > 0:
        above = poisson_isf(np.array([LOUD_TAIL, BRIGHT_TAIL]), rate)
        loud, bright = max(loud, float(above[0]) + 1.0), max(bright, float(above[1]) + 1.0)
    out = np.empty(plane.shape, np.int8)
    if plane.ndim == 2:
        mark_levels(plane, loud, bright, out)
    else:
        out[...] = 0
        out[plane >= loud] = 1
        out[plane >= bright] = 2
    return out


def poisson_isf(tail: np.ndarray, rate: float) -> np.ndarray:
    """``scipy.stats.poisson.isf(tail, rate)`` for tails in (0, 1) and a rate > 0, without its
    argument handling: the same ufunc steps (``poisson._ppf(1 - tail, rate)``: ``pdtrik``, then
    ``pdtr`` one count lower), so the same values.

    Examples
    --------
    >>> poisson_isf(np.array([1e-3, 1e-6]), 2.0).tolist()
    [8.0, 12.0]
    """
    q = 1.0 - np.asarray(tail, np.float64)
    counts = np.ceil(special.pdtrik(q, rate))
    below = np.maximum(counts - 1, 0)
    return np.where(special.pdtr(below, rate) >= q, below, counts) + 0.0


def quiet_keep(loud: np.ndarray, away=None) -> np.ndarray:
    """(Y, X) bool: the pixels of each row whose rows two above and below (those that
    exist) are quiet in every channel and whose rows beside it are not bright
    (``loud`` = the largest :func:`loud_pixels` over channels), and, with ``away``, that
    lie away from the tissue's edge (:func:`.regions.away_from_edges`). Pass the
    transposes for the columns."""
    keep = np.ones(loud.shape, bool)
    for d, most in ((1, 1), (2, 0)):
        keep[d:] &= loud[:-d] <= most
        keep[:-d] &= loud[d:] <= most
    if away is not None:
        keep &= away
    return keep


def line_parts(length: int) -> np.ndarray:
    """Edges of the parts a line is cut into: about 64 px or more each, at most 4.

    Examples
    --------
    >>> line_parts(100).tolist(), line_parts(400).tolist()
    ([0, 100], [0, 100, 200, 300, 400])
    """
    return _line_parts(int(length))


@functools.lru_cache(maxsize=32)
def _line_parts(length: int) -> np.ndarray:
    n = int(min(4, max(1, length // 64)))
    edges = np.linspace(0, length, n + 1).astype(int)
    edges.setflags(write=False)  # kept for the next channel
    return edges


def quiet_line_counts(image: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Per row of ``image`` and part of it: its counts and its neighbours' in the pixels ``keep``.

    Returns (2, parts, rows) float64 (parts: :func:`line_parts` of the row length):
    ``A`` = the row's sum over its kept pixels, ``B`` = the sum of rows ``y - 1`` and
    ``y + 1`` over the same pixels. The first and last rows (one neighbour only) get 0.

    Examples
    --------
    >>> image = np.ones((5, 3)); image[2] = 0.0
    >>> loud = np.zeros((5, 3), np.int8); loud[0, 1] = 1
    >>> quiet_line_counts(image, quiet_keep(loud))[:, 0, 2].tolist()  # pixel 1 of row 2 out
    [0.0, 4.0]
    """
    image = np.asarray(image)
    edges = line_parts(image.shape[1])
    out = np.zeros((2, len(edges) - 1, image.shape[0]))
    if image.shape[0] < 3:
        return out
    # in one pass: np.multiply(image[1:-1], keep[1:-1], dtype=float64) and np.add(image[:-2],
    # image[2:], dtype=float64) * keep[1:-1], each summed per part as np.add.reduceat does
    quiet_sums(np.ascontiguousarray(image), np.ascontiguousarray(keep, dtype=bool), edges, out)
    return out


def stripe_counts(image: np.ndarray, keeps) -> tuple[np.ndarray, np.ndarray]:
    """:func:`quiet_line_counts` of the rows and of the columns of one channel.

    ``keeps`` = (:func:`quiet_keep` of the loud pixels, the same of their transpose).
    """
    image = np.asarray(image)
    # the columns from a contiguous transposed copy: line sums along rows are far faster
    return (quiet_line_counts(image, keeps[0]),
            quiet_line_counts(np.ascontiguousarray(image.T), keeps[1]))


def drop_pvalues(line: np.ndarray, beside: np.ndarray) -> np.ndarray:
    """One-sided p-values of a drop: ``P(X <= line)`` for ``X ~ Binomial(line + beside, 1/3)``.

    ``line`` is a line's count, ``beside`` the count of the two lines beside it over the
    same pixels (the exact conditional test of two Poisson counts, Przyborowski &
    Wilenski 1940). Computed as the regularised incomplete beta ``I_{2/3}(n - k, k + 1)``
    (the binomial distribution function, Abramowitz & Stegun 26.5.24, from memory), which
    also takes non-integer counts (compensated data). 1 where ``n = 0`` or ``k >= n``.

    Examples
    --------
    >>> from scipy.stats import binomtest
    >>> p = drop_pvalues(np.array([3.0]), np.array([27.0]))[0]
    >>> bool(np.isclose(p, binomtest(3, 30, 1 / 3, alternative="less").pvalue))
    True
    """
    k = np.maximum(np.asarray(line, np.float64), 0.0)
    n = k + np.maximum(np.asarray(beside, np.float64), 0.0)
    out = np.ones(np.broadcast(k, n).shape)
    test = k < n
    out[test] = special.betainc(n[test] - k[test], k[test] + 1.0, 1.0 - NULL_SHARE)
    return out


#: A part of a line vetoes a drop when it holds this improbably many counts for one.
PART_ALPHA = 0.01


def significant_drops(counts: np.ndarray, settings: QualitySettings) -> np.ndarray:
    """Lines whose quiet-pixel counts, summed over channels, drop significantly.

    ``counts`` is (C, 2, parts, L) from :func:`quiet_line_counts` (data units; counts are
    ``counts_per_unit`` times them). Returns (L,) bool: over the whole line, with at least
    ``stripe_min_counts`` counts beside it, ``P < stripe_alpha`` (:func:`drop_pvalues`) and ``2 A / B < 1 - stripe_drop``, and no part
    of the line holds significantly more than a drop to ``1 - stripe_drop`` leaves
    (upper tail of the same binomial at that ratio below ``PART_ALPHA``): a drop-out
    spans the line, a gap between cells that happen to line up does not.
    """
    line, beside = np.asarray(counts, np.float64).sum(axis=0) * settings.counts_per_unit
    kept = 1.0 - settings.stripe_drop
    share = kept / (kept + 2.0)
    k, n = np.maximum(line, 0.0), np.maximum(line, 0.0) + np.maximum(beside, 0.0)
    upper = np.ones(k.shape)
    test = k > 0
    upper[test] = special.betainc(k[test], n[test] - k[test] + 1.0, share)
    whole_line, whole_beside = line.sum(axis=0), beside.sum(axis=0)
    return ((upper >= PART_ALPHA).all(axis=0) & (whole_beside >= settings.stripe_min_counts)
            & (2.0 * whole_line < kept * whole_beside)
            & (drop_pvalues(whole_line, whole_beside) < settings.stripe_alpha))


def striped_lines(counts: np.ndarray, settings: QualitySettings) -> tuple[int, ...]:
    """Indices of the striped lines (see the module notes); ``counts`` as for
    :func:`significant_drops`."""
    striped = significant_drops(counts, settings)
    return tuple(int(i) for i in np.flatnonzero(striped))
