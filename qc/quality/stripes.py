"""The ``striped`` test: rows or columns that drop out, with a Poisson significance level.

A line drop-out (a detector or stage fault) scales every count of one or two rows (or
columns) down, in every channel, background included. Two rules must both hold for a line
to be called striped:

1. **Drop across channels and along the line** (:func:`ratio_drops`): in every part of the
   line, the median over channels of a weighted line / neighbours ratio is below
   ``1 - stripe_drop`` (see its notes).
2. **A significant drop where the tissue is quiet** (:func:`drop_pvalues`). Per channel,
   the pixels of the line are kept where the lines two away on both sides are at or below
   the channel's Otsu split (the quiet part of the channel: background, dim stains); the
   line's counts ``A`` there, pooled over channels, are compared with the counts ``B`` of
   the two lines beside it at the same pixels. The choice of pixels depends only on the
   lines two away, so under the null it leaves ``A`` and ``B`` independent Poisson counts
   with means ``lam`` and ``2 lam``; conditional on ``n = A + B``, ``A`` is binomial
   ``(n, 1/3)``: the exact conditional test for comparing two Poisson counts
   (Przyborowski & Wilenski, *Biometrika* 31, 1940; reference
   ``scipy.stats.binomtest(A, n, 1/3, alternative="less")``). The line is significantly
   low when ``P(X <= A) < stripe_alpha``, and its pooled ratio ``2 A / B`` must also be
   below ``1 - stripe_drop``.

Rule 2 is what keeps the test silent where rule 1 alone is fooled: on low-count ROIs
(few channels hold enough counts to vote, and chance dips pass as drop-outs) and on small
ROIs where a gap between rows of cells spans a whole line (cells at the lines beside it
are not quiet at the lines two away, so those pixels are left out; in the quiet pixels
a gap has as many counts as its neighbours, a drop-out does not). A drop-out lowers the
background too, so it is found in the quiet pixels with many counts to spare.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import special

from .settings import QualitySettings

#: Probability of a line's counts under the null (no drop): one line against two.
NULL_SHARE = 1.0 / 3.0


def quiet_line_counts(image: np.ndarray, threshold: float) -> np.ndarray:
    """Per row of ``image``: its counts and its neighbours' counts in the quiet pixels.

    A pixel of row ``y`` is quiet when the pixels two rows above and below (those that
    exist) are at most ``threshold``. Returns (2, rows) float64: ``A`` = the row's sum over
    its quiet pixels, ``B`` = the sum of rows ``y - 1`` and ``y + 1`` over the same pixels.
    The first and last rows (one neighbour only) get 0 and 0.

    Examples
    --------
    >>> image = np.ones((5, 3)); image[2] = 0.0; image[0, 1] = 9.0
    >>> quiet_line_counts(image, 1.0)[:, 2].tolist()   # pixel 1 of row 2 is not quiet
    [0.0, 4.0]
    """
    image = np.asarray(image)
    out = np.zeros((2, image.shape[0]))
    if image.shape[0] < 3:
        return out
    quiet = image <= threshold
    keep = np.ones(image.shape, bool)
    keep[2:] &= quiet[:-2]
    keep[:-2] &= quiet[2:]
    middle = keep[1:-1]
    out[0, 1:-1] = np.where(middle, image[1:-1], 0).sum(axis=1, dtype=np.float64)
    out[1, 1:-1] = (np.where(middle, image[:-2], 0).sum(axis=1, dtype=np.float64)
                    + np.where(middle, image[2:], 0).sum(axis=1, dtype=np.float64))
    return out


def stripe_counts(image: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray]:
    """:func:`quiet_line_counts` of the rows and of the columns of one channel."""
    image = np.asarray(image)
    return quiet_line_counts(image, threshold), quiet_line_counts(image.T, threshold)


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


def ratio_drops(sums: np.ndarray, settings: QualitySettings) -> np.ndarray:
    """Rule 1: lines whose intensity drops below (1 - stripe_drop) of their neighbours', across channels.

    For each channel, the line ``a`` is compared pixel by pixel with the mean
    ``nb`` of the two lines beside it, weighting pixels by ``w + mean(w)`` where
    ``w`` is the mean of the lines two away: ``ratio = sum(a (w + m)) / sum(nb (w
    + m))``. Weights from lines that are neither ``a`` nor ``nb`` keep Poisson
    noise from biasing the ratio, and weighting where the tissue is bright makes
    the ratio about 1 wherever cells simply continue across lines; a line
    drop-out (every pixel of one or two lines scaled down) gives a ratio near its
    scale factor (about twice it for two adjacent lines). The ratio is taken in
    each part of the line and in each channel whose neighbour lines hold at least
    ``stripe_min_counts`` counts; a line drops when, in *every* part, the median ratio
    over those channels is below ``1 - stripe_drop``: a drop-out spans the whole line, a
    natural gap between cells does not. The first and last lines (neighbours on one side
    only, where the image edge cuts cells) are not judged. ``sums`` is (C, 3, segments, L)
    (the line sums of the channel measurements). Returns (L,) bool.
    """
    num, den, near = sums[:, 0], sums[:, 1], sums[:, 2]  # (C, segments, L)
    votes = near.sum(axis=1) * settings.counts_per_unit >= max(settings.stripe_min_counts, 1e-12)
    usable = votes[:, None, :] & (den > 0)
    ratio = np.where(usable, num / np.where(usable, den, 1.0), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # parts where no channel votes
        median = np.nanmedian(ratio, axis=0)  # (segments, L)
        highest = np.nanmax(median, axis=0)
    judged = usable.any(axis=0).all(axis=0)
    judged[[0, -1]] = False
    return judged & (highest < 1.0 - settings.stripe_drop)


def significant_drops(counts: np.ndarray, settings: QualitySettings) -> np.ndarray:
    """Rule 2: lines whose quiet-pixel counts, pooled over channels, drop significantly.

    ``counts`` is (C, 2, L) from :func:`quiet_line_counts` (data units; counts are
    ``counts_per_unit`` times them). Returns (L,) bool: ``P < stripe_alpha``
    (:func:`drop_pvalues`) and ``2 A / B < 1 - stripe_drop``.
    """
    pooled = np.asarray(counts, np.float64).sum(axis=0) * settings.counts_per_unit
    line, beside = pooled
    low = 2.0 * line < (1.0 - settings.stripe_drop) * beside
    return low & (drop_pvalues(line, beside) < settings.stripe_alpha)


def striped_lines(sums: np.ndarray, counts: np.ndarray, settings: QualitySettings
                  ) -> tuple[int, ...]:
    """Indices of the striped lines: both rules of the module notes hold."""
    striped = ratio_drops(sums, settings) & significant_drops(counts, settings)
    return tuple(int(i) for i in np.flatnonzero(striped))
