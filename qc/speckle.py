"""Hot pixels and sparse speckle: two cleaning steps that remove isolated counts.

Hot pixels
    Single-pixel spikes. A pixel is hot when it exceeds the maximum of its 8 neighbours by
    at least ``min_excess`` counts and either exceeds ``ratio`` times that maximum
    (thresholded median replacement, common practice) or sits on a flat structure with
    an excess that Poisson noise cannot explain: its brightest neighbour is not
    significantly brighter than the brightest pixel two steps out (so it is no peak of a
    small object) and it exceeds that neighbour by more than ``flat_sigmas`` Poisson
    standard deviations. The second test finds spikes on or beside bright cells, where
    the ratio test is blind; the peak of a tiny Gaussian-ish speck falls off steeply
    from ring 1 to ring 2 and is left alone. Only detected pixels are restored, with the
    (low) median of their 8 neighbours (detect, then restore: Chan, Ho & Nikolova 2005).

Speckle
    Isolated background counts are sparse and spatially independent; real signal is
    clustered. A positive pixel (``value > threshold``) is kept when

    * the number ``n`` of positive pixels among its ``(2r+1)^2 - 1`` neighbours is
      improbable for background: ``P(N >= n) < alpha`` with ``N ~ Binomial(m, p)``
      (a *core* pixel: the core-point rule of DBSCAN, Ester et al. 1996, on the pixel
      grid, with its count threshold derived from a false-keep rate), or
    * (only with ``keep_touching``) it touches a core pixel, 8-connected: DBSCAN's border
      points at distance 1. This keeps more of thin processes in high background, and
      more background beside cells; it is off by default, where background counts in
      the rims of cells weigh more, or
    * its own value is improbable for background: ``P(Y >= value) < value_alpha`` with
      ``Y ~ Poisson(level)``, so bright tiny objects survive.

    Then kept pixels are grouped into 8-connected components and components smaller than
    ``min_area`` are dropped. Bright pixels take part in that rule like any other: the
    default ``min_area = 2`` removes a single isolated bright count (a hot-ish speckle)
    while a real speck of two or more pixels stays. Dropped pixels are set to 0; pixels at
    or below ``threshold`` are left as they are.

Background
    ``p`` (the background positive rate) and ``level`` (the background mean) are estimated
    once per channel by :func:`estimate_background`. Under background alone the centre of
    a window is positive with probability ``p`` whatever its neighbours are, so among
    windows with ``n`` positive neighbours the fraction of positive centres estimates ``p``
    for every ``n`` (the conditional maximum likelihood). Only windows with few positive
    neighbours (``n`` up to the median of ``Binomial(m, p)``, iterated to a fixed point
    from the 1 % quantile of all ``n``) are used: a window centred in a cell has many
    positive neighbours and does not enter, and a window that merely grazes a cell has a
    background centre and so does not bias the estimate. Only windows wholly inside the
    image count. ``level`` follows from ``p`` under a Poisson background:
    ``P(Y > threshold) = p``, i.e. ``level = -log(1 - p)`` for ``threshold = 0``.

Chunked stacks
    The background estimate is a property of the whole channel: for dask input it is
    computed first (one pass over the channel), then the filter runs block by block with
    ``dask.array.map_overlap``, ``boundary='none'`` (the kernels treat the image edge
    themselves, exactly as for numpy) and the depth from :func:`speckle_depth`, which
    makes every block's result identical to the whole-image result. Window counts are
    exact ``radius`` pixels in from the block edge, kept marks ``radius + 1`` in (the
    ``keep_touching`` rule looks one pixel further).
    A kept component smaller than ``min_area`` spans fewer than ``min_area`` pixels, so
    seen from the block's own part it cannot leave a margin of ``min_area - 1`` pixels;
    if the part seen in the block does leave that margin, the component has at least
    ``min_area`` pixels anyway. Hence ``depth = radius + 1 + (min_area - 1) = radius +
    min_area``.

References
----------
.. [1] R. H. Chan, C.-W. Ho and M. Nikolova, "Salt-and-pepper noise removal by
   median-type noise detectors and detail-preserving regularization", IEEE Trans.
   Image Process. 14(10):1479-1485, 2005.
.. [2] M. Ester, H.-P. Kriegel, J. Sander and X. Xu, "A density-based algorithm for
   discovering clusters in large spatial databases with noise", Proc. KDD-96, 226-231.
"""

from __future__ import annotations

import dataclasses
import functools
import os
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from typing import Any, NamedTuple

import numpy as np
from plexwash.qc import _speckle_kernels as _k  # absolute: one numba cache, whatever imported us
from scipy import special

from .errors import InputError
from .settings import describe_range, setting

__all__ = [
    "HOT_PIXEL_DEPTH",
    "BackgroundEstimate",
    "HotPixelSettings",
    "SpeckleSettings",
    "StepResult",
    "estimate_background",
    "hot_pixels_stack",
    "remove_hot_pixels",
    "remove_speckle",
    "speckle_depth",
    "speckle_stack",
]

#: Depth of the hot-pixel rule under ``map_overlap``: the 8 neighbours and the ring beyond.
HOT_PIXEL_DEPTH = 2
#: Quantile of all neighbour counts where the background fit starts.
_FIT_START_QUANTILE = 0.01
#: The background fit uses windows with up to the (1 - this) point of Binomial(m, p) positive
#: neighbours: 0.5, the median, keeps windows centred in cells out.
_FIT_UPPER_TAIL = 0.5


# ----------------------------------------------------------------------------- settings


@dataclasses.dataclass(frozen=True)
class HotPixelSettings:
    """Hot-pixel step settings (recipe section ``[hot_pixels]``)."""

    enabled: bool = setting(True, "restore single-pixel spikes from their neighbours")
    ratio: float = setting(
        5.0, "a hot pixel exceeds this many times the brightest of its 8 neighbours", low=1.0, high=1000.0
    )
    min_excess: float = setting(
        10.0, "and exceeds that neighbour by at least this many counts", low=0.0, high=1e6
    )
    flat_sigmas: float = setting(
        6.0,
        "on flat structures a pixel is also hot when it exceeds its brightest neighbour by this many"
        " Poisson standard deviations (0: off)",
        low=0.0,
        high=100.0,
    )


@dataclasses.dataclass(frozen=True)
class SpeckleSettings:
    """Speckle step settings (recipe section ``[speckle]``)."""

    enabled: bool = setting(True, "remove isolated background counts by a local-density test")
    threshold: float = setting(
        0.5,
        "a pixel is positive when its value is above this (0.5: a whole count; ignores sub-count residue"
        " left by compensation)",
        low=0.0,
        high=1e6,
    )
    radius: int = setting(2, "half-width of the square window in which positive neighbours are counted", low=1, high=50)
    alpha: float = setting(
        0.01, "keep a pixel when its neighbour count is this improbable for background", low=0.0, high=0.5, low_open=True
    )
    value_alpha: float = setting(
        1e-6, "keep a pixel when its own value is this improbable for background", low=0.0, high=0.5, low_open=True
    )
    keep_touching: bool = setting(
        False, "also keep positive pixels touching a dense pixel (more of thin processes, more background beside cells)"
    )
    min_area: int = setting(2, "drop kept groups of fewer pixels (8-connected)", low=1, high=100)


# ----------------------------------------------------------------------------- results


class StepResult(NamedTuple):
    """What a cleaning step returns.

    Attributes
    ----------
    image : numpy.ndarray or dask.array.Array
        Cleaned data, float32 (one channel, or a C x Y x X stack for the stack functions).
    removed : numpy.ndarray or dask.array.Array
        The removed map: input - output, float32, same shape.
    stats : dict or list of dict
        Numbers about the step (one dict per channel for stacks). For dask input the
        entries measured on the output (``n_pixels``, ``n_removed``, ``removed_fraction``)
        are 0-d dask arrays; compute them together with the output.
    """

    image: Any
    removed: Any
    stats: Any


class BackgroundEstimate(NamedTuple):
    """Background of one channel, as the speckle filter sees it.

    Attributes
    ----------
    rate : float
        ``p``, the probability that a background pixel is positive.
    level : float
        ``lambda``, the background mean of a Poisson model with ``P(Y > threshold) = p``.
    count_threshold : int
        Smallest positive-neighbour count kept by the density test in a full window
        (``(2r+1)^2`` if none can be).
    value_threshold : float
        Smallest whole count kept by the value test (values above ``value_threshold - 1``
        are kept; ``inf`` when none are).
    threshold, radius, alpha, value_alpha
        The settings the estimate was made with.
    """

    rate: float
    level: float
    count_threshold: int
    value_threshold: float
    threshold: float
    radius: int
    alpha: float
    value_alpha: float


# ----------------------------------------------------------------------------- hot pixels


def remove_hot_pixels(
    image, *, ratio: float = 5.0, min_excess: float = 10.0, flat_sigmas: float = 6.0
) -> StepResult:
    """Restore hot pixels of one channel from the median of their 8 neighbours.

    With ``v`` the pixel, ``m1`` the brightest of its 8 neighbours and ``m2`` the
    brightest of the 16 pixels two steps out, a pixel is hot when ``v - m1 >=
    min_excess`` and either

    * ``v > ratio * max(m1, 0)``, or
    * ``m1 - m2 <= s * sqrt(m1 + m2)`` (no peak of a small object around it) and
      ``v - m1 > s * sqrt(v + m1)`` (more than Poisson noise), ``s = flat_sigmas``.

    Detection uses the input only; then each detected pixel, and only those, is replaced
    by the median of its 8 neighbours: the low median (rank 3 of 0..7), so that a spike
    on the edge of a cell, with four cell and four background neighbours, is restored to
    background rather than given a cell value it never had. Image edges are mirrored (the
    edge pixel is not its own neighbour). Two adjacent bright pixels of similar value are never hot, so real
    specks of two or more pixels are left alone; a tiny Gaussian-ish speck (sigma >= 0.65
    px) has its peak at most ~2.6 times its brightest neighbour and falls off steeply
    beyond, so neither test touches it.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel. Not modified.
    ratio : float, optional
        How many times the brightest neighbour a hot pixel exceeds (>= 1).
    min_excess : float, optional
        By how many counts at least a hot pixel exceeds its brightest neighbour (>= 0).
    flat_sigmas : float, optional
        Poisson standard deviations of the flat-structure test; 0 turns it off (the
        plain ratio rule).

    Returns
    -------
    StepResult
        ``image`` cleaned (float32), ``removed`` = input - output, ``stats`` with
        ``n_pixels`` (pixels restored) and ``removed_fraction`` (fraction of the
        channel's signal removed).

    References
    ----------
    .. [1] R. H. Chan, C.-W. Ho and M. Nikolova, IEEE Trans. Image Process. 14(10),
       2005 (two-phase detect-then-restore).

    Examples
    --------
    >>> import numpy as np
    >>> img = np.ones((5, 5), np.float32); img[2, 2] = 400.0
    >>> out, removed, st = remove_hot_pixels(img)
    >>> float(out[2, 2]), float(removed[2, 2]), st["n_pixels"]
    (1.0, 399.0, 1)
    """
    settings = _settings(HotPixelSettings, "hot_pixels", ratio=ratio, min_excess=min_excess,
                         flat_sigmas=flat_sigmas)
    if _is_dask(image):
        return _hot_pixels_dask(_channel(image, "image"), settings)
    return _hot_pixels_numpy(_channel(image, "image"), settings)


def _hot_pixels_numpy(image: np.ndarray, settings: HotPixelSettings, out=None, removed=None) -> StepResult:
    out, removed = _outputs(image, out, removed)
    n = _k.hot_pixels(image, *_hot_parameters(settings), out, removed)
    return StepResult(out, removed, {"n_pixels": int(n), "removed_fraction": _fraction(removed, image)})


def _outputs(image: np.ndarray, out, removed):
    """The arrays a kernel fills: given views (planes of a stack) or new ones."""
    if out is None:
        out, removed = np.empty(image.shape, np.float32), np.empty(image.shape, np.float32)
    return out, removed


def _hot_parameters(settings: HotPixelSettings) -> tuple[float, float, float]:
    return float(settings.ratio), float(settings.min_excess), float(settings.flat_sigmas)


def _hot_pixels_block(block, parameters):
    out = np.empty(block.shape, np.float32)
    _k.hot_pixels(np.ascontiguousarray(block), *parameters, out, np.empty_like(out))
    return out


def _hot_pixels_dask(image, settings: HotPixelSettings) -> StepResult:
    block_step = functools.partial(_hot_pixels_block, parameters=_hot_parameters(settings))
    out = image.map_overlap(
        block_step,
        depth=HOT_PIXEL_DEPTH,
        boundary="none",
        dtype=np.float32,
        meta=np.empty((0, 0), np.float32),
    )
    removed = image - out
    stats = {"n_pixels": (removed > 0).sum(), "removed_fraction": _fraction(removed, image)}
    return StepResult(out, removed, stats)


# ----------------------------------------------------------------------------- background


def estimate_background(
    image,
    *,
    threshold: float = 0.5,
    radius: int = 2,
    alpha: float = 0.01,
    value_alpha: float = 1e-6,
) -> BackgroundEstimate:
    """Estimate a channel's background positive rate and level, robustly to cells.

    On background a window's centre is positive with probability ``p`` independently of
    its ``n`` positive neighbours. ``p`` is the fraction of positive centres among full
    windows with ``n <= K``, ``K`` the median of ``Binomial((2r+1)^2 - 1, p)``, iterated to
    a fixed point from the 1 % quantile of all ``n``: windows centred in cells have large
    ``n`` and stay out, windows grazing a cell have background centres and do not bias it.
    The background level follows from a Poisson model: ``P(Y > threshold) = p``.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel, at least ``2 * radius + 1`` pixels a side. For dask input the
        neighbour-count histogram is computed here (one pass).
    threshold : float, optional
        A pixel is positive when its value is above this (>= 0). The default 0.5 is "at
        least one count" for count data and ignores the tiny positive residue that
        compensation leaves in pixels without counts (which would otherwise inflate ``p``).
    radius : int, optional
        Window half-width.
    alpha, value_alpha : float, optional
        False-keep rates of the density and value tests, used for the thresholds
        reported in the estimate.

    Returns
    -------
    BackgroundEstimate

    References
    ----------
    .. [1] M. Ester et al., Proc. KDD-96 (the core-point rule that the thresholds serve).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> img = rng.poisson(0.2, (400, 400)).astype(np.float32)  # P(Y > 0) = 0.181
    >>> bg = estimate_background(img)
    >>> round(bg.rate, 2), round(bg.level, 1), bg.count_threshold, bg.value_threshold
    (0.18, 0.2, 10, 6.0)
    """
    settings = _settings(
        SpeckleSettings, "speckle", threshold=threshold, radius=radius, alpha=alpha, value_alpha=value_alpha
    )
    if _is_dask(image):
        histogram = np.asarray(_centre_histogram_dask(_channel(image, "image"), settings).compute())
    else:
        image = _channel(image, "image")
        _check_window(image.shape, settings.radius)
        counts = _counts(image, settings)
        histogram = _centre_histogram(image, counts, settings)
    return _background_from_histogram(histogram, settings)


def _counts(image: np.ndarray, settings: SpeckleSettings) -> np.ndarray:
    counts = np.empty(image.shape, np.uint16)
    _k.window_counts(image, np.float32(settings.threshold), int(settings.radius), counts)
    return counts


def _centre_histogram(image: np.ndarray, counts: np.ndarray, settings: SpeckleSettings) -> np.ndarray:
    """``histogram[c, n]``: full windows with centre positive (c = 1) or not and n positive neighbours."""
    radius = int(settings.radius)
    histogram = np.zeros((2, (2 * radius + 1) ** 2), np.int64)
    _k.centre_histogram(image, counts, np.float32(settings.threshold), radius, histogram)
    return histogram


def _codes_block(block, threshold, radius):
    """Per pixel ``n + c * (2r+1)^2`` (uint16), to histogram a dask channel block by block."""
    block = np.ascontiguousarray(block)
    counts = np.empty(block.shape, np.uint16)
    _k.window_counts(block, threshold, radius, counts)
    positive = block > threshold
    return (counts - positive + positive * np.uint16((2 * radius + 1) ** 2)).astype(np.uint16)


def _histogram_block(block, size):
    return np.bincount(block.ravel(), minlength=size).reshape(1, 1, size)


def _centre_histogram_dask(image, settings: SpeckleSettings):
    """:func:`_centre_histogram` of a dask channel (lazy, independent of chunking)."""
    import dask.array as da

    radius = int(settings.radius)
    _check_window(image.shape, radius)
    codes = image.map_overlap(
        functools.partial(_codes_block, threshold=np.float32(settings.threshold), radius=radius),
        depth=radius,
        boundary="none",
        dtype=np.uint16,
        meta=np.empty((0, 0), np.uint16),
    )
    inner = codes[radius : image.shape[0] - radius, radius : image.shape[1] - radius]
    size = 2 * (2 * radius + 1) ** 2
    per_block = da.map_blocks(
        functools.partial(_histogram_block, size=size),
        inner,
        new_axis=2,
        chunks=(1, 1, size),
        dtype=np.int64,
        meta=np.empty((0, 0, 0), np.int64),
    )
    return per_block.sum(axis=(0, 1)).reshape(2, size // 2)


def _background_from_histogram(histogram: np.ndarray, settings: SpeckleSettings) -> BackgroundEstimate:
    window = (2 * int(settings.radius) + 1) ** 2
    rate = _fit_rate(histogram)
    level = _poisson_level(rate, settings.threshold)
    count_threshold = int(_binomial_min_count(np.array([window - 1]), rate, settings.alpha)[0])
    return BackgroundEstimate(
        rate=rate,
        level=level,
        count_threshold=count_threshold,
        value_threshold=_poisson_min_value(level, settings.value_alpha),
        threshold=float(settings.threshold),
        radius=int(settings.radius),
        alpha=float(settings.alpha),
        value_alpha=float(settings.value_alpha),
    )


def _fit_rate(histogram: np.ndarray) -> float:
    """Background positive rate from ``histogram[centre positive, n]`` (see :func:`estimate_background`)."""
    histogram = np.asarray(histogram, np.float64)
    neighbours = histogram.shape[1] - 1
    cumulative = np.cumsum(histogram.sum(axis=0))
    if cumulative[-1] == 0:
        raise InputError("image", "no window lies wholly inside the image")
    upper = int(np.searchsorted(cumulative, _FIT_START_QUANTILE * cumulative[-1]))
    seen = set()
    rate = 0.0
    while upper not in seen:
        seen.add(upper)
        positive, negative = histogram[1, : upper + 1].sum(), histogram[0, : upper + 1].sum()
        rate = float(positive / (positive + negative))
        upper = _binomial_upper_point(neighbours, rate, _FIT_UPPER_TAIL)
    return rate


def _binomial_upper_point(trials: int, rate: float, tail: float) -> int:
    """Smallest ``k`` with ``P(N > k) <= tail``, ``N ~ Binomial(trials, rate)`` (scipy's ``isf``)."""
    survival = special.bdtrc(np.arange(trials + 1), trials, rate)  # P(N > k)
    return int(np.argmax(survival <= tail))


def _poisson_level(rate: float, threshold: float) -> float:
    """Mean ``lambda`` of a Poisson count with ``P(Y > threshold) = rate``."""
    if rate <= 0.0:
        return 0.0
    if rate >= 1.0:
        return float("inf")
    # P(Y > k) = P(Y >= k + 1) = regularised lower incomplete gamma P(k + 1, lambda)
    return float(special.gammaincinv(np.floor(threshold) + 1.0, rate))


def _poisson_min_value(level: float, value_alpha: float) -> float:
    """Smallest whole ``v >= 1`` with ``P(Y >= v) < value_alpha``, ``Y ~ Poisson(level)``."""
    if not np.isfinite(level):
        return float("inf")

    def tail(v):  # P(Y >= v) = P(Y > v - 1)
        return special.pdtrc(v - 1, level)

    low, high = 0, 1  # invariant: tail(low) >= value_alpha > tail(high)
    while tail(high) >= value_alpha:
        low, high = high, 2 * high
    while high - low > 1:
        mid = (low + high) // 2
        low, high = (low, mid) if tail(mid) < value_alpha else (mid, high)
    return float(high)


def _binomial_min_count(trials: np.ndarray, rate: float, alpha: float) -> np.ndarray:
    """Smallest ``k`` with ``P(N >= k) < alpha``, ``N ~ Binomial(trials, rate)``, per entry.

    ``k = trials + 1`` (never kept) when even ``P(N = trials)`` is not below ``alpha``.
    """
    trials = np.asarray(trials, np.int64)
    low = np.zeros_like(trials)  # P(N >= 0) = 1 >= alpha
    high = trials + 1  # P(N >= trials + 1) = 0 < alpha
    while np.any(high - low > 1):
        mid = (low + high) // 2
        below = special.bdtrc(mid - 1, trials, rate) < alpha  # P(N >= mid) = P(N > mid - 1)
        low = np.where(below, low, mid)
        high = np.where(below, mid, high)
    return high


def _min_count_table(radius: int, rate: float, alpha: float) -> np.ndarray:
    """``table[a, b]``: smallest kept neighbour count for a window of ``a`` x ``b`` pixels."""
    side = 2 * radius + 1
    a, b = np.meshgrid(np.arange(side + 1), np.arange(side + 1), indexing="ij")
    trials = np.maximum(a * b - 1, 0)
    return _binomial_min_count(trials, rate, alpha).astype(np.int32)


# ----------------------------------------------------------------------------- speckle


def speckle_depth(settings: SpeckleSettings) -> int:
    """Overlap that makes the chunked speckle filter equal the whole-image filter.

    ``radius`` for the window counts, 1 for the ``keep_touching`` rule, ``min_area - 1`` for the
    component-size rule (see the module notes).

    Examples
    --------
    >>> speckle_depth(SpeckleSettings(radius=2, min_area=2))
    4
    """
    return int(settings.radius) + 1 + max(int(settings.min_area) - 1, 0)


def remove_speckle(
    image,
    *,
    threshold: float = 0.5,
    radius: int = 2,
    alpha: float = 0.01,
    value_alpha: float = 1e-6,
    keep_touching: bool = False,
    min_area: int = 2,
    background: BackgroundEstimate | None = None,
) -> StepResult:
    """Remove sparse background counts of one channel by a local-density test.

    A positive pixel (``value > threshold``) is kept when its positive-neighbour count
    ``n`` in the ``(2r+1)^2`` window is improbable for background (``P(N >= n) < alpha``,
    ``N ~ Binomial(m, p)``, ``m`` = neighbours inside the image), when its value is
    improbable for background (``P(Y >= value) < value_alpha``, ``Y ~ Poisson(level)``),
    or, with ``keep_touching``, when it touches a pixel kept by density. Kept 8-connected
    components smaller than ``min_area`` are dropped; bright single pixels too, so an
    isolated hot-ish count goes while a speck of two or more pixels stays. Dropped pixels
    become 0; pixels at or below ``threshold`` are left as they are.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel, at least ``2 * radius + 1`` pixels a side. Not modified. For dask
        input without ``background`` the estimate is computed here (one pass), then the
        filter stays lazy.
    threshold : float, optional
        A pixel is positive when its value is above this (compared in float32); 0.5 means
        "at least one count" and ignores sub-count residue left by compensation.
    radius : int, optional
        Window half-width; the cost does not depend on it (running box sums).
    alpha : float, optional
        False-keep rate of the density test for one background pixel.
    value_alpha : float, optional
        False-keep rate of the value test for one background pixel.
    keep_touching : bool, optional
        Also keep positive pixels touching a pixel kept by density (DBSCAN's border
        points): more of thin processes in high background, and more background counts
        beside cells.
    min_area : int, optional
        Smallest kept component, in pixels (1: no size rule).
    background : BackgroundEstimate, optional
        Use this estimate (e.g. made once on a whole channel) instead of estimating
        from ``image``. Its ``threshold`` must equal ``threshold``.

    Returns
    -------
    StepResult
        ``stats``: ``rate``, ``level``, ``count_threshold`` (smallest kept neighbour
        count in a full window), ``value_threshold`` (smallest whole count kept by
        value), ``n_removed`` (pixels set to 0), ``removed_fraction``.

    References
    ----------
    .. [1] M. Ester, H.-P. Kriegel, J. Sander and X. Xu, Proc. KDD-96, 226-231.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((40, 40), np.float32)
    >>> img[5, 5] = 1.0                  # an isolated count
    >>> img[20:26, 20:26] = 2.0          # a small cell
    >>> out, removed, st = remove_speckle(img)
    >>> float(out[5, 5]), float(out[22, 22]), st["n_removed"]
    (0.0, 2.0, 1)
    """
    settings = _settings(
        SpeckleSettings,
        "speckle",
        threshold=threshold,
        radius=radius,
        alpha=alpha,
        value_alpha=value_alpha,
        keep_touching=keep_touching,
        min_area=min_area,
    )
    if background is not None and float(background.threshold) != float(settings.threshold):
        raise InputError(
            "background", f"estimated with threshold {background.threshold:g}, filter uses {settings.threshold:g}"
        )
    image = _channel(image, "image")
    _check_window(image.shape, settings.radius)
    if _is_dask(image):
        if background is None:
            histogram = _centre_histogram_dask(image, settings).compute()
            background = _background_from_histogram(np.asarray(histogram), settings)
        return _speckle_dask(image, settings, background)
    return _speckle_numpy(image, settings, background)


def _speckle_numpy(image: np.ndarray, settings: SpeckleSettings, background, out=None, removed=None) -> StepResult:
    counts = _counts(image, settings)
    if background is None:
        background = _background_from_histogram(_centre_histogram(image, counts, settings), settings)
    out, removed = _outputs(image, out, removed)
    n_removed = _speckle_apply(image, counts, _filter_parameters(settings, background), out, removed)
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=int(n_removed), removed_fraction=_fraction(removed, image))
    return StepResult(out, removed, stats)


def _filter_parameters(settings: SpeckleSettings, background: BackgroundEstimate) -> dict:
    """Everything the kernel needs besides the pixels."""
    value_threshold = _poisson_min_value(background.level, settings.value_alpha)
    return {
        "threshold": np.float32(settings.threshold),
        "radius": int(settings.radius),
        "min_count": _min_count_table(int(settings.radius), background.rate, settings.alpha),
        "value_cut": float(value_threshold - 1.0),
        "min_area": int(settings.min_area),
        "pass_through": background.rate >= 1.0,
        "keep_touching": bool(settings.keep_touching),
    }


def _speckle_apply(image, counts, params: dict, out, removed) -> int:
    if params["pass_through"]:  # every window is full: no pixel is sparser than background
        out[...] = image
        removed[...] = 0.0
        return 0
    kernel_args = {k: v for k, v in params.items() if k != "pass_through"}
    return _k.speckle_filter(image, counts, out=out, removed=removed, **kernel_args)


def _speckle_block(block, params: dict):
    block = np.ascontiguousarray(block)
    counts = np.empty(block.shape, np.uint16)
    _k.window_counts(block, params["threshold"], params["radius"], counts)
    out = np.empty(block.shape, np.float32)
    _speckle_apply(block, counts, params, out, np.empty_like(out))
    return out


def _speckle_dask(image, settings: SpeckleSettings, background: BackgroundEstimate) -> StepResult:
    out = image.map_overlap(
        functools.partial(_speckle_block, params=_filter_parameters(settings, background)),
        depth=speckle_depth(settings),
        boundary="none",
        dtype=np.float32,
        meta=np.empty((0, 0), np.float32),
    )
    removed = image - out
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=(removed > 0).sum(), removed_fraction=_fraction(removed, image))
    return StepResult(out, removed, stats)


def _speckle_stats(settings: SpeckleSettings, background: BackgroundEstimate) -> dict:
    window = (2 * int(settings.radius) + 1) ** 2
    return {
        "rate": float(background.rate),
        "level": _finite_or_none(float(background.level)),
        "count_threshold": int(_binomial_min_count(np.array([window - 1]), background.rate, settings.alpha)[0]),
        "value_threshold": _finite_or_none(_poisson_min_value(background.level, settings.value_alpha)),
    }


def _finite_or_none(value: float):
    return value if np.isfinite(value) else None


# ----------------------------------------------------------------------------- stacks


def hot_pixels_stack(stack, settings: HotPixelSettings | Sequence[HotPixelSettings] | None = None) -> StepResult:
    """Hot-pixel step on a (C, Y, X) stack, numpy or dask.

    Parameters
    ----------
    stack : (C, Y, X) array_like or dask array
        Not modified.
    settings : HotPixelSettings or sequence of them, optional
        One for all channels, or one per channel. A channel whose settings have
        ``enabled=False`` passes through unchanged (zero removed map).

    Returns
    -------
    StepResult
        ``(cleaned, removed, stats)``: float32 stacks (numpy in -> numpy out, dask in ->
        dask out, same chunks) and one stats dict per channel (``enabled``, ``n_pixels``,
        ``removed_fraction``).

    Examples
    --------
    >>> import numpy as np
    >>> stack = np.zeros((2, 8, 8), np.float32); stack[:, 4, 4] = 300.0
    >>> off = HotPixelSettings(enabled=False)
    >>> cleaned, removed, st = hot_pixels_stack(stack, [HotPixelSettings(), off])
    >>> cleaned[:, 4, 4].tolist(), [s["n_pixels"] for s in st]
    ([0.0, 300.0], [1, 0])
    """
    stack = _stack(stack)
    per_channel = _per_channel(settings, HotPixelSettings, stack.shape[0])

    def channel_step(c, image, s, out, removed):
        return _hot_pixels_numpy(image, s, out, removed)

    def block_kernel(c, s):
        return functools.partial(_hot_pixels_block, parameters=_hot_parameters(s)), HOT_PIXEL_DEPTH, {}

    return _run_stack(stack, per_channel, channel_step, passive={"n_pixels": 0},
                      block_kernel=block_kernel, count_key="n_pixels")


def speckle_stack(stack, settings: SpeckleSettings | Sequence[SpeckleSettings] | None = None) -> StepResult:
    """Speckle step on a (C, Y, X) stack, numpy or dask.

    Each channel's background is estimated once on the whole channel (for dask, all
    channels in one pass, computed here), so results do not depend on chunking.

    Parameters
    ----------
    stack : (C, Y, X) array_like or dask array
        Not modified.
    settings : SpeckleSettings or sequence of them, optional
        One for all channels, or one per channel. A channel whose settings have
        ``enabled=False`` passes through unchanged (zero removed map).

    Returns
    -------
    StepResult
        ``(cleaned, removed, stats)``: float32 stacks and one stats dict per channel
        (``enabled``, ``rate``, ``level``, ``count_threshold``, ``value_threshold``,
        ``n_removed``, ``removed_fraction``).

    Examples
    --------
    >>> import numpy as np
    >>> stack = np.zeros((1, 30, 30), np.float32); stack[0, 3, 3] = 1.0
    >>> cleaned, removed, st = speckle_stack(stack)
    >>> float(removed[0, 3, 3]), st[0]["n_removed"]
    (1.0, 1)
    """
    stack = _stack(stack)
    per_channel = _per_channel(settings, SpeckleSettings, stack.shape[0])
    for s in per_channel:
        if s.enabled:
            _check_window(stack.shape, s.radius)
    backgrounds = {}
    if _is_dask(stack):
        import dask

        enabled = [c for c, s in enumerate(per_channel) if s.enabled]
        histograms = dask.compute(*[_centre_histogram_dask(stack[c], per_channel[c]) for c in enabled])
        for c, histogram in zip(enabled, histograms, strict=True):
            backgrounds[c] = _background_from_histogram(np.asarray(histogram), per_channel[c])

    def channel_step(c, image, s, out, removed):
        return _speckle_numpy(image, s, None, out, removed)

    def block_kernel(c, s):
        kernel = functools.partial(_speckle_block, params=_filter_parameters(s, backgrounds[c]))
        return kernel, speckle_depth(s), _speckle_stats(s, backgrounds[c])

    passive = {"rate": None, "level": None, "count_threshold": None, "value_threshold": None, "n_removed": 0}
    return _run_stack(stack, per_channel, channel_step, passive=passive,
                      block_kernel=block_kernel, count_key="n_removed")


def _run_stack(stack, per_channel: list, channel_step, *, passive: dict, block_kernel,
               count_key: str) -> StepResult:
    """Apply a step to every enabled channel of a numpy or dask stack.

    numpy: ``channel_step(c, channel, settings, out, removed)`` writes straight into the
    planes of the result stacks, channels in parallel threads (the kernels release the GIL).
    dask: ``block_kernel(c, settings) -> (kernel, depth, stats)`` gives each channel's 2-D
    block kernel; one ``map_overlap`` over whole (C, y, x) blocks applies them all, with
    the largest depth any channel needs (a larger halo never changes a kernel's result).
    One graph over whole blocks keeps memory bounded by a few blocks plus their halos.
    """
    if _is_dask(stack):
        return _run_stack_dask(stack, per_channel, block_kernel, passive=passive, count_key=count_key)
    n_channels = stack.shape[0]

    def one(c, out=None, removed=None) -> StepResult:
        s, image = per_channel[c], stack[c]
        if s.enabled:
            result = channel_step(c, image, s, out, removed)
            return result._replace(stats={"enabled": True, **result.stats})
        stats = {"enabled": False, **passive, "removed_fraction": 0.0}
        if _is_dask(image):
            return StepResult(image, image * np.float32(0), stats)
        out[...] = image
        removed[...] = 0.0
        return StepResult(out, removed, stats)

    from threadpoolctl import threadpool_limits

    cleaned = np.empty(stack.shape, np.float32)
    removed = np.empty(stack.shape, np.float32)

    def store(c):
        return one(c, cleaned[c], removed[c]).stats

    workers = min(n_channels, os.cpu_count() or 1)
    with threadpool_limits(limits=1):  # kernels run in parallel threads; keep BLAS pools out of their way
        if workers <= 1:
            stats = [store(c) for c in range(n_channels)]
        else:
            with ThreadPoolExecutor(max_workers=workers) as pool:
                stats = list(pool.map(store, range(n_channels)))
    return StepResult(cleaned, removed, stats)


def _run_stack_dask(stack, per_channel: list, block_kernel, *, passive: dict, count_key: str) -> StepResult:
    chunks = stack.chunks
    stack = stack.rechunk({0: -1})  # every block holds all channels: kernels index them
    kernels = [block_kernel(c, s) if s.enabled else None for c, s in enumerate(per_channel)]
    depth = max((k[1] for k in kernels if k is not None), default=0)

    def apply(block):
        out = np.empty(block.shape, np.float32)
        for c, kernel in enumerate(kernels):
            out[c] = kernel[0](block[c]) if kernel is not None else block[c]
        return out

    if depth:
        cleaned = stack.map_overlap(apply, depth={0: 0, 1: depth, 2: depth}, boundary="none",
                                    dtype=np.float32, meta=np.empty((0, 0, 0), np.float32))
    else:
        cleaned = stack
    removed = stack - cleaned
    if chunks[0] != stack.chunks[0]:  # dask in, dask out with the caller's chunks
        cleaned, removed = cleaned.rechunk(chunks), removed.rechunk(chunks)
    stats = []
    for c, kernel in enumerate(kernels):
        if kernel is None:
            stats.append({"enabled": False, **passive, "removed_fraction": 0.0})
            continue
        stats.append({"enabled": True, **kernel[2], count_key: (removed[c] > 0).sum(),
                      "removed_fraction": _fraction(removed[c], stack[c])})
    return StepResult(cleaned, removed, stats)


# ----------------------------------------------------------------------------- helpers


def _is_dask(array) -> bool:
    return type(array).__module__.startswith("dask.")


def _as_float32(array, what: str, ndim: int):
    if _is_dask(array):
        dtype = array.dtype
    else:
        array = np.asarray(array)
        dtype = array.dtype
    if array.ndim != ndim:
        shape = "x".join(str(n) for n in array.shape) or "scalar"
        raise InputError(what, f"expected a {ndim}-D array, got shape {shape}")
    if not (np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.floating)):
        raise InputError(what, f"expected real numbers, got dtype {dtype}")
    if any(n < 3 for n in array.shape[-2:]):
        raise InputError(what, f"needs at least 3 x 3 pixels, got {array.shape[-2]} x {array.shape[-1]}")
    if _is_dask(array):
        return array.astype(np.float32)
    return np.ascontiguousarray(array, dtype=np.float32)


def _channel(image, what: str):
    return _as_float32(image, what, 2)


def _stack(stack):
    return _as_float32(stack, "stack", 3)


def _check_window(shape, radius: int) -> None:
    side = 2 * int(radius) + 1
    if shape[-2] < side or shape[-1] < side:
        raise InputError(
            "speckle.radius", f"window of {side} px is larger than the image ({shape[-2]} x {shape[-1]})"
        )


def _fraction(removed, image):
    """Fraction of the channel's signal that was removed (0 when the channel has none).

    For dask input a 0-d dask array (array arithmetic only: in dask 2026.8 computing
    ``Delayed`` objects together with arrays in one ``dask.compute`` misorders results).
    """
    part, total = removed.sum(dtype=np.float64), image.sum(dtype=np.float64)
    if _is_dask(removed):
        return part * (total > 0) / np.maximum(total, np.finfo(np.float64).tiny)
    return float(part) / float(total) if total > 0 else 0.0


def _per_channel(settings, kind, n_channels: int) -> list:
    if settings is None:
        settings = kind()
    if isinstance(settings, kind):
        return [settings] * n_channels
    settings = list(settings)
    if len(settings) != n_channels:
        raise InputError("settings", f"{len(settings)} settings for {n_channels} channels")
    for s in settings:
        if not isinstance(s, kind):
            raise InputError("settings", f"expected {kind.__name__}, got {type(s).__name__}")
    return settings


def _settings(kind, section: str, **values):
    """Build a settings object from keyword arguments, checking types and ranges."""
    fields = {f.name: f for f in dataclasses.fields(kind)}
    for name, value in values.items():
        meta = fields[name].metadata
        expected = type(fields[name].default)
        key = f"{section}.{name}"
        if expected is bool:
            if not isinstance(value, (bool, np.bool_)):
                raise InputError(key, f"must be true or false, got {value!r}")
            values[name] = bool(value)
            continue
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise InputError(key, f"must be a number, got {value!r}")
        if expected is int:
            if float(value) != int(value):
                raise InputError(key, f"must be a whole number, got {value!r}")
            value = int(value)
        else:
            value = float(value)
            if not np.isfinite(value):
                raise InputError(key, f"must be finite, got {value!r}")
        low, high = meta.get("low"), meta.get("high")
        if (low is not None and (value < low or (meta.get("low_open") and value == low))) or (
            high is not None and (value > high or (meta.get("high_open") and value == high))
        ):
            raise InputError(key, f"= {value!r} is out of range; allowed: {describe_range(meta)}")
        values[name] = value
    return kind(**values)
