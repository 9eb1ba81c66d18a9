"""Speckle: sparse background counts removed by a local-density test.

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
.. [1] M. Ester, H.-P. Kriegel, J. Sander and X. Xu, "A density-based algorithm for
   discovering clusters in large spatial databases with noise", Proc. KDD-96, 226-231.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
from plexwash.qc.steps import _kernels as _k  # absolute: one numba cache, whatever imported us
from scipy import special

from .._arrays import as_channel, as_stack, is_dask
from ..errors import InputError
from ..settings import build_settings, setting
from .lifting import (
    StepResult,
    kernel_outputs,
    lift_channel,
    per_channel_settings,
    removed_fraction,
    run_stack,
)

__all__ = [
    "BackgroundEstimate",
    "SpeckleSettings",
    "estimate_background",
    "remove_speckle",
    "speckle_depth",
    "speckle_stack",
]

#: Quantile of all neighbour counts where the background fit starts.
_FIT_START_QUANTILE = 0.01
#: The background fit uses windows with up to the (1 - this) point of Binomial(m, p) positive
#: neighbours: 0.5, the median, keeps windows centred in cells out.
_FIT_UPPER_TAIL = 0.5



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
    settings = build_settings(SpeckleSettings, {"threshold": threshold, "radius": radius, "alpha": alpha,
                                                "value_alpha": value_alpha}, section="speckle")
    if is_dask(image):
        histogram = np.asarray(_centre_histogram_dask(as_channel(image), settings).compute())
    else:
        image = as_channel(image)
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
    values = {"threshold": threshold, "radius": radius, "alpha": alpha, "value_alpha": value_alpha,
              "keep_touching": keep_touching, "min_area": min_area}
    settings = build_settings(SpeckleSettings, values, section="speckle")
    if background is not None and float(background.threshold) != float(settings.threshold):
        raise InputError(
            "background", f"estimated with threshold {background.threshold:g}, filter uses {settings.threshold:g}"
        )
    image = as_channel(image)
    _check_window(image.shape, settings.radius)
    if is_dask(image):
        if background is None:
            histogram = _centre_histogram_dask(image, settings).compute()
            background = _background_from_histogram(np.asarray(histogram), settings)
        return _speckle_dask(image, settings, background)
    return _speckle_numpy(image, settings, background)


def _speckle_numpy(image: np.ndarray, settings: SpeckleSettings, background, out=None, removed=None) -> StepResult:
    counts = _counts(image, settings)
    if background is None:
        background = _background_from_histogram(_centre_histogram(image, counts, settings), settings)
    out, removed = kernel_outputs(image, out, removed)
    n_removed = _speckle_apply(image, counts, _filter_parameters(settings, background), out, removed)
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=int(n_removed), removed_fraction=removed_fraction(removed, image))
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
    out = lift_channel(image, _speckle_block, speckle_depth(settings),
                       params=_filter_parameters(settings, background))
    removed = image - out
    stats = _speckle_stats(settings, background)
    stats.update(n_removed=(removed > 0).sum(), removed_fraction=removed_fraction(removed, image))
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
    stack = as_stack(stack)
    per_channel = per_channel_settings(settings, SpeckleSettings, stack.shape[0])
    for s in per_channel:
        if s.enabled:
            _check_window(stack.shape, s.radius)
    backgrounds = {}
    if is_dask(stack):
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
    return run_stack(stack, per_channel, channel_step, passive=passive,
                     block_kernel=block_kernel, count_key="n_removed")



def _check_window(shape, radius: int) -> None:
    side = 2 * int(radius) + 1
    if shape[-2] < side or shape[-1] < side:
        raise InputError(
            "speckle.radius", f"window of {side} px is larger than the image ({shape[-2]} x {shape[-1]})"
        )


