"""Tissue vs glass, and a background rate that varies over the ROI (computed once per ROI).

Tissue lies on glass: inside it every channel's background counts are several times those
on the glass, and they drift over the tissue. One rate per channel is wrong in both places.

- :func:`tissue_mask`. Rule: the used channels' counts are summed per pixel, isolated
  spikes (hot pixels) cut to their largest neighbour, the sum Gaussian-smoothed and
  log-scaled, then split by Otsu's threshold (N. Otsu, IEEE Trans. Syst. Man Cybern.
  9(1):62-66, 1979; ``skimage.filters.threshold_otsu``). The split stands only when the
  lower class looks like glass (a low rate per channel, the upper class several times
  brighter); otherwise the whole ROI is tissue. Pieces and holes smaller than ``min_area``
  are merged into their surroundings (morphological clean-up, common practice).
- :func:`likely_signal`: pixels of a small box whose counts are improbable under the
  current rate (one-sided Poisson test; ``P(N >= n)`` is the regularised incomplete gamma
  function, Abramowitz & Stegun 6.5.2, 26.4.21). Such pixels are left out of every rate.
- :func:`local_background`: one channel's rate per pixel, estimated within each region
  (tissue, glass) so the two never mix across the tissue edge, by box sums
  (``scipy.ndimage.uniform_filter``, cost independent of the box). Alone, a channel gets
  the mean of its remaining pixels over a large box; given the shared variation
  (:func:`shared_modulation`), it gets ``scale * variation`` with the scale matched on the
  lower tail of its box counts (:func:`lower_tail_scale`), so that a stain covering most
  of a region is not read as background. The first rate is deliberately low so that such
  a stain tests as signal; test and estimate then alternate ``passes`` times.
- :func:`background_model`: both for a whole stack. Background is modelled as a rate per
  channel and region times one variation over the ROI shared by every channel (tissue
  density drives the non-specific counts of all channels alike; a stain does not).

The ROI's background context shared by a wash's steps (block sums, zones) is in
:mod:`.background_context`.

Known limit: a channel whose raw counts hold a stain or spillover ghosts over nearly all of
its tissue (a diffuse stain whose free pixels carry ghosts) has no pixel of plain
background, and its rate comes out high; this is why the speckle step takes only the mask
and the shared variation from here and fits each channel's rate per region itself, on the
counts it cleans.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import ndimage, special
from skimage.filters import threshold_otsu

from ._tail_search import TailSearch, search_kernels, tail_below
from .errors import InputError
from .settings import setting

#: Bins of the histogram Otsu's threshold is found on (as skimage's default).
OTSU_BINS = 256


@dataclasses.dataclass(frozen=True)
class BackgroundSettings:
    """Settings of the tissue mask and the local background model."""

    smoothing_sigma: float = setting(
        3.0, "Gaussian sigma in pixels of the summed counts before the tissue/glass split",
        low=0.0, high=100.0)
    glass_rate: float = setting(
        0.05, "glass is found only where its mean counts per pixel and channel are at most this",
        low=0.0, low_open=True, high=1e9)
    min_contrast: float = setting(
        2.0, "... and the tissue's median summed counts are at least this times the glass mean",
        low=1.0, high=1e6)
    min_area: int = setting(
        400, "tissue pieces and glass holes smaller than this many pixels are merged away",
        low=0, high=10**9)
    spike_ratio: float = setting(
        5.0, "a pixel above this times its largest neighbour is a spike (cut before the split)",
        low=1.0, high=1e6)
    spike_excess: float = setting(
        20.0, "... and only when it exceeds that neighbour by at least this many counts",
        low=0.0, high=1e12)
    test_box: int = setting(
        5, "edge in pixels of the box whose counts are tested for likely signal", low=1, high=51)
    signal_alpha: float = setting(
        1e-3, "a box is likely signal when its counts are this improbable under the background",
        low=0.0, low_open=True, high=0.5)
    window: int = setting(
        41, "edge in pixels of the box the local background rate is averaged over",
        low=3, high=4001)
    prior_pixels: float = setting(
        200.0, "usable pixels' worth of weight given to the region's own rate in every box",
        low=0.0, high=1e9)
    scale_window: int = setting(
        25, "edge in pixels of the boxes whose lower tail sets a channel's background scale",
        low=3, high=4001)
    scale_quantile: float = setting(
        0.2, "lower quantile of the box counts the background scale is matched on",
        low=0.01, high=0.5)
    passes: int = setting(
        2, "rounds of signal test and rate estimate", low=1, high=20)
    floor: float = setting(
        1e-4, "smallest background rate in counts per pixel", low=0.0, low_open=True, high=1e6)


@dataclasses.dataclass(frozen=True)
class BackgroundModel:
    """One ROI's ``tissue`` mask (Y, X) bool, background ``rates`` (C, Y, X) float32 in
    counts per pixel, ``region_rates`` (C, 2): mean rate on glass and in tissue (NaN where
    absent), and the shared variation ``modulation`` (Y, X) float32, mean 1 per region."""

    tissue: np.ndarray
    rates: np.ndarray
    region_rates: np.ndarray
    modulation: np.ndarray


def cut_spikes(image: np.ndarray, *, ratio: float = 5.0, excess: float = 20.0) -> np.ndarray:
    """A copy of ``image`` with spikes cut to the largest of their 8 neighbours.

    A spike exceeds ``ratio`` times that neighbour and by at least ``excess`` (thresholded
    neighbour replacement, common practice).
    """
    image = np.asarray(image, np.float64)
    footprint = np.ones((3, 3), bool)
    footprint[1, 1] = False
    largest = ndimage.maximum_filter(image, footprint=footprint, mode="nearest")
    spike = (image > ratio * largest) & (image - largest >= excess)
    return np.where(spike, largest, image)


def otsu_threshold(values: np.ndarray) -> float:
    """Otsu's threshold of ``values`` over a 256-bin histogram of their range.

    Same result as ``skimage.filters.threshold_otsu(values)`` (the histogram is built
    here and handed to it, as skimage builds it for float images).
    """
    values = np.asarray(values)
    low, high = float(values.min()), float(values.max())
    if high <= low:
        return low
    counts, edges = np.histogram(values, bins=OTSU_BINS, range=(low, high))
    return float(threshold_otsu(hist=(counts, (edges[:-1] + edges[1:]) / 2.0)))


def tissue_mask(stack, *, used=None, settings: BackgroundSettings = BackgroundSettings()
                ) -> np.ndarray:
    """Where the tissue lies in a ROI: (Y, X) bool, True on tissue.

    ``used`` (bool per channel, default all) picks the channels summed. All True when no
    glass is found (see the module notes).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> rate = np.full((120, 120), 0.01); rate[:, 50:] = 0.12
    >>> stack = rng.poisson(np.broadcast_to(rate, (10, 120, 120)))
    >>> mask = tissue_mask(stack)
    >>> bool(mask[:, 60:].all()), bool(mask[:, :40].any())
    (True, False)
    """
    stack = np.asarray(stack)
    if stack.ndim != 3:
        raise InputError("stack", f"expected a (C, Y, X) stack, got shape {stack.shape}")
    used = np.ones(stack.shape[0], bool) if used is None else np.asarray(used, bool)
    if used.shape != (stack.shape[0],):
        raise InputError("used", f"{used.size} flags for a stack of {stack.shape[0]} channels")
    total = np.zeros(stack.shape[1:], np.float64)
    for c in np.flatnonzero(used):
        total += stack[c]
    total = cut_spikes(total, ratio=settings.spike_ratio, excess=settings.spike_excess)
    n_used = int(used.sum())
    sigma = settings.smoothing_sigma
    smoothed = ndimage.gaussian_filter(total, sigma, mode="reflect") if sigma > 0 else total
    smoothed = np.maximum(smoothed, 0.0) + max(1e-3 * float(np.mean(smoothed)), 1e-9)
    level = np.log(smoothed)  # the offset keeps empty glass from minus infinity
    above = level > otsu_threshold(level)
    if not above.any() or above.all():
        return np.ones(total.shape, bool)
    glass_mean = float(smoothed[~above].mean())
    tissue_median = float(np.median(smoothed[above]))
    if (glass_mean > settings.glass_rate * max(n_used, 1)
            or tissue_median < settings.min_contrast * glass_mean):
        return np.ones(total.shape, bool)
    return clean_mask(above, min_area=settings.min_area)


def clean_mask(mask: np.ndarray, *, min_area: int) -> np.ndarray:
    """``mask`` with pieces, then holes, smaller than ``min_area`` pixels merged away.
    """
    out = np.array(mask, bool)
    if min_area <= 1:
        return out
    for value in (True, False):  # small tissue pieces go first, then small glass holes
        labels, n = ndimage.label(out == value)
        if n == 0:
            continue
        sizes = np.bincount(labels.ravel(), minlength=n + 1)
        small = sizes < min_area
        small[0] = False
        if small[1:].all():  # nothing but small pieces: keep them rather than lose the class
            continue
        out[small[labels]] = not value
    return out


def poisson_upper_tail(n: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """``P(N >= n)`` for ``N ~ Poisson(mu)``: the regularised lower incomplete gamma ``P(n, mu)``.

    Reference check: equals ``scipy.stats.poisson.sf(n - 1, mu)``.
    """
    n = np.asarray(n, np.float64)
    mu = np.maximum(np.asarray(mu, np.float64), 1e-300)
    return np.where(n <= 0, 1.0, special.gammainc(np.maximum(n, 1.0), mu))


def likely_signal(image: np.ndarray, rate, *, box: int, alpha: float) -> np.ndarray:
    """(Y, X) bool: every pixel of a ``box`` x ``box`` window whose count sum ``n`` has
    ``P(N >= n) < alpha`` under ``N ~ Poisson(box**2 * rate)``."""
    area = float(box * box)
    image = np.asarray(image, np.float64)
    # a box of one pixel: scipy's filter returns the plane's values themselves
    sums = np.rint((image if box == 1 else ndimage.uniform_filter(image, box, mode="reflect")) * area)
    mean = area * np.asarray(rate, np.float64)
    if mean.shape != sums.shape:  # a rate per pixel already has the plane's shape
        mean = np.broadcast_to(mean, sums.shape)
    # n <= mean implies P(N >= n) > 1/2 >= alpha (a Poisson median is >= mean - ln 2, Choi
    # 1994): only windows above their mean can be improbable, the tail is computed there
    above = sums > mean
    improbable = np.zeros(sums.shape, bool)
    improbable[above] = tail_below(sums[above], mean[above], alpha, poisson_upper_tail)
    if box > 1:
        improbable = ndimage.maximum_filter(improbable, size=box, mode="constant")
    return improbable


def local_background(image, *, mask=None, modulation=None, return_regions: bool = False,
                     settings: BackgroundSettings = BackgroundSettings()):
    """A channel's background rate at every pixel, in counts per pixel (see the module notes).

    Without ``modulation`` the rate starts at the ``scale_quantile`` of the region's box
    means and is then the mean of the pixels left over a ``window`` box, shrunk towards
    their region mean by ``prior_pixels``.

    Parameters
    ----------
    image : (Y, X) array_like
        One channel's raw counts (hot pixels may be present: they test as signal).
    mask : (Y, X) bool, optional
        Tissue mask (:func:`tissue_mask`); the rate is estimated separately on tissue
        and glass. Default: one region.
    modulation : (Y, X) array_like, optional
        Variation shared by every channel (:func:`shared_modulation`).
    settings : BackgroundSettings
    return_regions : bool
        Also return the mean rate of each region, ``(glass, tissue)`` (NaN where absent).

    Returns
    -------
    numpy.ndarray
        (Y, X) float32, at least ``settings.floor``.

    Examples
    --------
    >>> rng = np.random.default_rng(3)
    >>> image = rng.poisson(0.1, (200, 200)).astype(float); image[90:110, 90:110] += 20
    >>> rate = local_background(image)
    >>> 0.08 < float(rate[100, 100]) < 0.12
    True
    """
    image = np.asarray(image, np.float64)
    if image.ndim != 2:
        raise InputError("image", f"expected a (Y, X) plane, got shape {image.shape}")
    regions = _regions(image.shape, mask)
    pattern = None if modulation is None else np.asarray(modulation, np.float64)
    region_rates = np.full(2, np.nan)
    rate = np.zeros(image.shape, np.float64)
    usable = np.ones(image.shape, bool)
    for step in range(settings.passes + 1):
        if step:
            usable = ~likely_signal(image, np.maximum(rate, settings.floor),
                                    box=settings.test_box, alpha=settings.signal_alpha)
        for k, region in enumerate(regions):
            keep = usable & region
            if not keep.any():
                continue
            if pattern is not None:
                scale = lower_tail_scale(image, pattern, keep, window=settings.scale_window,
                                         quantile=settings.scale_quantile)
                rate[region] = scale * pattern[region]
            elif step == 0:  # low, so that a stain covering most of a region tests as signal
                boxes = _box_mean(image, keep, region, 0.0, 0.0, settings.window)
                rate[region] = float(np.quantile(boxes[region], settings.scale_quantile))
            else:
                local = _box_mean(image, keep, region, float(image[keep].mean()),
                                  settings.prior_pixels, settings.window)
                rate[region] = local[region]
            region_rates[k] = float(rate[region].mean())
    rate = np.maximum(rate, settings.floor).astype(np.float32)
    return (rate, region_rates) if return_regions else rate


def lower_tail_scale(image, pattern, keep, *, window: int, quantile: float) -> float:
    """Scale ``s`` of a background ``s * pattern``, matched on the lower tail of box counts.

    A box of pure background (kept pixels only) holds ``n`` counts, about normal with mean
    and variance ``s m`` (Poisson; ``m`` = the box's sum of ``pattern``). ``s`` makes the
    ``quantile`` of ``(n - s m) / sqrt(s m)`` over the boxes equal ``Phi^-1(quantile)``
    (bisection on ``log s``). A stain raising up to ``1 - quantile`` of the boxes does
    not raise ``s``.
    """
    area = float(window) ** 2
    kept = keep.astype(np.float64)
    counts = _box_mean_constant(image * kept, window) * area
    weight = _box_mean_constant(pattern * kept, window) * area
    step = max(1, window // 4)  # neighbouring boxes overlap almost fully: a sample is enough
    sample = np.zeros(keep.shape, bool)
    sample[::step, ::step] = True
    sample &= keep
    sample[sample] = weight[sample] >= 0.25 * area * float(pattern[keep].mean())
    if not sample.any():
        return float(image[keep].sum()) / max(float(pattern[keep].sum()), 1e-12)
    n, m = counts[sample], weight[sample]
    target = float(special.ndtri(quantile))
    low, high = np.log(1e-9), np.log(max(float(n.sum() / m.sum()), 1e-9) * 10.0)
    if TailSearch.usable(n, m):  # all 32 steps in one compiled loop, decided by counting
        low, high = TailSearch(n, m, quantile).bisect(low, high, target, 32)
        return float(np.exp(0.5 * (low + high)))
    for _ in range(32):  # brackets e^-21 .. 10x the mean: 32 halvings leave < 1e-8 in log s
        mid = 0.5 * (low + high)
        s = np.exp(mid)
        if np.quantile((n - s * m) / np.sqrt(s * m), quantile) > target:
            low = mid
        else:
            high = mid
    return float(np.exp(0.5 * (low + high)))


def _regions(shape, mask) -> tuple[np.ndarray, np.ndarray]:
    """(glass, tissue) bool maps; without a mask, everything is tissue."""
    tissue = np.ones(shape, bool) if mask is None else np.asarray(mask, bool)
    if tissue.shape != tuple(shape):
        raise InputError("mask", f"shape {tissue.shape} differs from the image's {tuple(shape)}")
    return ~tissue, tissue


def _box_mean(image, keep, region, prior: float, weight: float, window: int) -> np.ndarray:
    """Mean of the kept pixels of ``region`` in each box, shrunk towards ``prior`` by ``weight``.

    Outside ``region`` the value is meaningless.
    """
    area = float(window) ** 2
    kept = (keep & region).astype(np.float64)
    counts = _box_mean_constant(image * kept, window) * area
    pixels = _box_mean_constant(kept, window) * area
    return (counts + weight * prior) / np.maximum(pixels + weight, 1e-12)


def _box_mean_constant(values: np.ndarray, window: int) -> np.ndarray:
    """``ndimage.uniform_filter(values, window, mode="constant")`` of a 2-D float64 plane, by a
    compiled loop taking scipy's steps (``steps._search_kernels.box_mean_constant``: the same
    bits, tested), without scipy's per-call set-up."""
    values = np.ascontiguousarray(values, np.float64)
    if values.ndim != 2 or window < 2:
        return ndimage.uniform_filter(values, window, mode="constant")
    out = np.empty(values.shape, np.float64)
    search_kernels().box_mean_constant(values, int(window), out)
    return out


def shared_modulation(rates: np.ndarray, region_rates: np.ndarray, mask) -> np.ndarray:
    """Variation shared by all channels, (Y, X) float32 with mean 1 per region.

    Per pixel, the median over channels of local rate / region rate: a stain raising one
    channel over a large area does not move it.
    """
    rates = np.asarray(rates)
    regions = _regions(rates.shape[1:], mask)
    flat = rates.reshape(rates.shape[0], -1)
    out = np.ones(rates.shape[1:], np.float64)
    for k, region in enumerate(regions):
        valid = np.isfinite(region_rates[:, k]) & (region_rates[:, k] > 0)
        if not region.any() or not valid.any():
            continue
        rows, divisors = np.flatnonzero(valid), region_rates[valid, k][:, None]
        where = np.flatnonzero(region.ravel())
        values = np.empty(where.size, np.float64)
        # The median of each pixel's column alone, a slice of pixels at a time: the same
        # values as over the whole region at once, without channels x pixels float64 copies.
        for start in range(0, where.size, MEDIAN_SLICE):
            part = where[start:start + MEDIAN_SLICE]
            ratios = flat[np.ix_(rows, part)].astype(np.float64) / divisors
            values[start:start + part.size] = np.median(ratios, axis=0)
        out[region] = values / max(float(values.mean()), 1e-12)
    return out.astype(np.float32)


#: Pixels per slice of :func:`shared_modulation`'s medians (a few MiB of float64 per slice).
MEDIAN_SLICE = 1 << 15


def background_model(stack, *, used=None, settings: BackgroundSettings = BackgroundSettings(),
                     rates_out=None) -> BackgroundModel:
    """Tissue mask and local background rates of every channel of one (C, Y, X) raw stack.

    The shared variation comes from a first estimate of each channel on its own. ``used``
    (bool per channel, default all) picks the channels that form the mask and the shared
    variation; every channel gets a rate. ``rates_out``: a float32 array of the stack's
    shape to hold the rates (e.g. a memory map in a staging folder, so a big ROI's rates
    are not held in memory); the same values as without.

    Examples
    --------
    >>> rng = np.random.default_rng(5)
    >>> rate = np.full((160, 160), 0.01); rate[:, 60:] = 0.1
    >>> model = background_model(rng.poisson(np.broadcast_to(rate, (6, 160, 160))))
    >>> np.round(np.nanmean(model.region_rates, axis=0), 2).tolist()
    [0.01, 0.1]
    """
    stack = np.asarray(stack)
    used = np.ones(stack.shape[0], bool) if used is None else np.asarray(used, bool)
    tissue = tissue_mask(stack, used=used, settings=settings)
    first = np.empty(stack.shape, np.float32)
    region_rates = np.full((stack.shape[0], 2), np.nan)
    rough = dataclasses.replace(settings, passes=1)  # the median over channels forgives it

    def first_rates(c):
        first[c], region_rates[c] = local_background(stack[c], mask=tissue, settings=rough,
                                                     return_regions=True)

    _each_channel(first_rates, np.flatnonzero(used), stack[0].size)
    every = bool(used.all())  # then no copy of the first rates
    pattern = shared_modulation(first if every else first[used],
                                region_rates if every else region_rates[used], tissue)
    first = None  # the first rates are not needed again
    rates = np.empty(stack.shape, np.float32) if rates_out is None else rates_out

    def final_rates(c):
        rates[c], region_rates[c] = local_background(stack[c], mask=tissue, modulation=pattern,
                                                     settings=settings, return_regions=True)

    _each_channel(final_rates, range(stack.shape[0]), stack[0].size)
    if tissue.all():
        region_rates[:, 0] = np.nan
    return BackgroundModel(tissue=tissue, rates=rates, region_rates=region_rates,
                           modulation=pattern)


#: Pixels of a plane from which :func:`background_model` fits its channels on several threads
#: (a 512 x 512 ROI's block sums and up); smaller planes are fitted in turn (their cost is
#: Python's, which threads do not share).
THREADED_PLANE = 128 * 128


def _each_channel(function, channels, plane_size: int) -> None:
    """``function(c)`` for each channel: each channel's fit is its own (it reads the shared inputs
    and writes its own rows), so the order does not matter and the results are the same. On the
    wash's threads (dask's ``num_workers`` when set, else the cores) for planes of at least
    :data:`THREADED_PLANE` pixels; the compiled loops and numpy's whole-plane work release the GIL."""
    channels = list(channels)
    threads = min(_fit_threads(), len(channels)) if plane_size >= THREADED_PLANE else 1
    if threads <= 1:
        for c in channels:
            function(c)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(threads, thread_name_prefix="plexwash-background") as pool:
        for _ in pool.map(function, channels):
            pass


def _fit_threads() -> int:
    import os

    import dask

    return int(dask.config.get("num_workers", None) or os.cpu_count() or 1)
