"""One channel: spike-free copy, Otsu split, SBR, SNR, saturation, the flat-background excess test.

See the notes of :mod:`plexwash.qc.quality` (how a channel is measured).
"""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
from skimage.filters import threshold_otsu

from ..errors import InputError
from ._fit_kernels import otsu_index
from ._kernels import bin_sums, gaussian_reflect, split_mean_std, suppress_spikes, uniform_histogram
from .excess import fit_model, measure_excess_area
from .order import percentile
from .settings import DEFAULT_QUALITY, QualitySettings


@dataclasses.dataclass(frozen=True)
class ChannelQuality:
    """Quality of one channel.

    Attributes
    ----------
    name : str or None
        Channel name.
    sbr, snr : float
        Signal-to-background and signal-to-noise ratio (see the module notes).
    foreground_fraction : float
        Fraction of pixels above the Otsu split.
    foreground_mean, background_mean, background_std : float
        Statistics of the spike-free pixels on each side of the split.
    foreground_snr : float
        mean / std of the foreground pixels (:func:`region_snr`); about
        sqrt(counts per pixel) for Poisson-limited staining.
    threshold : float
        The Otsu split in intensity units (``expm1`` of the threshold found on the
        smoothed ``log1p`` channel).
    p50, p99, maximum : float
        Median, 99th percentile and maximum of the values as given.
    zero_fraction : float
        Fraction of pixels exactly 0 (values as given).
    saturated_fraction : float
        Fraction of spike-free pixels at or above the saturation level (0 when none applies).
    saturation_level : float or None
        The level used.
    spikes : int
        Number of isolated spikes (hot pixels) set aside.
    excess_area : float
        Pixels covered by bins with excess over the background (+ ghost) model.
    background_rate : float
        Fitted background counts per pixel of the excess test's model.
    ghost_sources : tuple of (str, float)
        Channels the model used to explain this one, with their fitted spillover
        fraction, largest first (empty when measured alone).
    flags : tuple of str
        Channel-level flags (``empty``, ``low-sbr``, ``saturated``).
    """

    name: str | None
    sbr: float
    snr: float
    foreground_fraction: float
    foreground_mean: float
    background_mean: float
    background_std: float
    foreground_snr: float
    threshold: float
    p50: float
    p99: float
    maximum: float
    zero_fraction: float
    saturated_fraction: float
    saturation_level: float | None
    spikes: int
    excess_area: float
    background_rate: float
    ghost_sources: tuple[tuple[str, float], ...]
    flags: tuple[str, ...]

    @property
    def empty(self) -> bool:
        """True when the channel is flagged ``empty``."""
        return "empty" in self.flags


@dataclasses.dataclass(frozen=True)
class ChannelSummary:
    """What a stack measurement keeps of one channel once its pixels are released."""

    bins: np.ndarray  # (ny, nx) spike-free sums in bins, data units


def region_snr(values) -> float:
    """Signal-to-noise ratio of a uniform region: mean / standard deviation.

    For a flat Poisson field of mean ``lam`` this is ``sqrt(lam)`` (Poisson
    statistics; Young, Gerbrands & van Vliet, *Fundamentals of Image Processing*).
    A region with zero spread gives ``inf`` (``nan`` when it is also all zero or empty).

    Parameters
    ----------
    values : array_like
        Pixel values of the region (any shape).

    Returns
    -------
    float

    Examples
    --------
    >>> round(region_snr([1.0, 3.0]), 6)
    2.0
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if v.size == 0:
        return math.nan
    return _mean_over_std(float(v.mean()), float(v.std()))


def _mean_over_std(mean: float, std: float) -> float:
    if std == 0.0:
        return math.inf if mean != 0.0 else math.nan
    return mean / std


def measure_channel(image, *, settings: QualitySettings = DEFAULT_QUALITY, dtype_max=None,
                    name: str | None = None) -> ChannelQuality:
    """Measure the quality of one channel.

    On its own a channel can only be compared with a flat background: faint
    spillover ghosts of other channels count as signal here. Use
    :func:`measure_stack` to judge ``empty`` with ghosts explained.

    Parameters
    ----------
    image : (Y, X) array_like
        One channel (numpy or dask; it is loaded into memory).
    settings : QualitySettings
        Thresholds.
    dtype_max : float, optional
        The detector's or original dtype's maximum (e.g. 65535 when uint16 data
        were converted to float); default: the integer dtype's maximum, none for floats.
    name : str, optional
        Channel name to carry in the result.

    Returns
    -------
    ChannelQuality

    References
    ----------
    .. [1] N. Otsu, "A threshold selection method from gray-level histograms",
       IEEE Trans. Syst. Man Cybern. 9(1), 1979.
    .. [2] D. B. Murphy, M. W. Davidson, *Fundamentals of Light Microscopy and
       Electronic Imaging*, 2nd ed., Wiley-Blackwell, 2012 (SNR).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> img = rng.poisson(0.1, (128, 128)).astype(np.uint16)
    >>> img[32:96, 32:96] += rng.poisson(20.0, (64, 64)).astype(np.uint16)
    >>> q = measure_channel(img)
    >>> q.sbr > 50, q.flags
    (True, ())
    """
    cq, _ = _measure(image, settings, dtype_max, name)
    return cq


def _measure(image, settings: QualitySettings, dtype_max, name, *, dtype=None):
    """Measure one channel; returns its ChannelQuality and what the stack needs later."""
    return measure_prepared(prepare_channel(image, settings, name, dtype=dtype), settings, dtype_max,
                             name)


def prepare_channel(image, settings: QualitySettings, name, *, dtype=None, memo=None) -> dict:
    """Check a channel, take the statistics of its values as given and its spike-free copy.

    Split from the rest so that the caller's reference to the pixels as given (a plane
    read from a lazy stack) is gone before the copies the split needs are made. ``memo``:
    order statistics of these values already selected (:func:`.order.percentile`).
    """
    key = name if name is not None else "image"
    raw = np.asarray(image)
    if dtype is None:
        dtype = raw.dtype
    if raw.ndim != 2:
        raise InputError(key, f"expected a 2-D channel, got shape {raw.shape}")
    if raw.size == 0:
        raise InputError(key, "channel has no pixels")
    if not (np.issubdtype(raw.dtype, np.integer) or np.issubdtype(raw.dtype, np.floating)
            or raw.dtype == bool):
        raise InputError(key, f"unsupported pixel type {raw.dtype}")
    if raw.dtype == bool:
        raw = raw.astype(np.uint8)
    if raw.dtype.kind == "f" and not np.all(np.isfinite(raw)):
        raise InputError(key, "channel contains NaN or infinite values")

    # statistics of the values as given, before the raw copy is released
    p50, p99 = (float(v) for v in percentile(raw, [50.0, 99.0], memo=memo))
    maximum = float(raw.max())
    zero_fraction = float(np.count_nonzero(raw == 0)) / raw.size
    clean, spikes = _suppress_spikes(raw, settings.spike_ratio, settings.spike_excess)
    return {"clean": clean, "spikes": spikes, "p50": p50, "p99": p99, "maximum": maximum,
            "zero_fraction": zero_fraction, "dtype": dtype}


def measure_prepared(prepared: dict, settings: QualitySettings, dtype_max, name, mask=None):
    """The rest of :func:`_measure`, from the spike-free copy (``prepared`` is emptied).

    With ``mask`` ((Y, X) bool, e.g. the tissue), the split, SBR and SNR use its pixels only.
    """
    clean = prepared.pop("clean")
    spikes, dtype = prepared["spikes"], prepared["dtype"]
    p50, p99, maximum = prepared["p50"], prepared["p99"], prepared["maximum"]
    zero_fraction = prepared["zero_fraction"]

    smoothed = _split_image(clean, settings.smoothing_sigma)
    region = smoothed if mask is None else smoothed[mask]
    low, high = float(region.min()), float(region.max())
    if high > low:
        t_log = float(_otsu(region, low, high))
    else:
        t_log = high
    foreground = smoothed > t_log
    del smoothed, region
    if mask is not None:
        foreground &= mask
    n_fg = int(np.count_nonzero(foreground))
    floor = settings.background_floor
    if 0 < n_fg < (clean.size if mask is None else int(np.count_nonzero(mask))):
        if mask is None:
            fg_mean, fg_std, bg_mean, bg_std = (float(v) for v in split_mean_std(clean, foreground))
        else:  # inside the tissue only (glass left out)
            fg_mean, fg_std = _mean_std(clean[foreground])
            bg_mean, bg_std = _mean_std(clean[mask & ~foreground])
        sbr = fg_mean / max(bg_mean, floor)
        snr = (fg_mean - bg_mean) / max(bg_std, floor)
        fg_snr = _mean_over_std(fg_mean, fg_std)
    else:  # nothing stands out: the whole channel is background
        inside = clean if mask is None else clean[mask]
        fg_mean = bg_mean = float(inside.mean(dtype=np.float64))
        bg_std = float(inside.std(dtype=np.float64))
        del inside
        sbr, snr, fg_snr = 1.0, 0.0, math.nan
        n_fg = 0
    del foreground

    level = _saturation_level(dtype, settings, dtype_max)
    saturated = 0.0 if level is None else float(np.count_nonzero(clean >= level)) / clean.size

    bins = _bin_sums(clean, settings.empty_bin)
    area = bin_areas(clean.shape, settings.empty_bin)
    mu, coef, _ = fit_model(bins.ravel(), area.ravel()[None, :], np.array([np.inf]), settings)
    excess_area = measure_excess_area(bins * settings.counts_per_unit, mu.reshape(bins.shape), area,
                               settings)
    flags = channel_flags(excess_area, sbr, saturated, settings)
    cq = ChannelQuality(
        name=name, sbr=sbr, snr=snr, foreground_fraction=n_fg / clean.size,
        foreground_mean=fg_mean, background_mean=bg_mean, background_std=bg_std,
        foreground_snr=fg_snr, threshold=float(np.expm1(t_log)), p50=p50, p99=p99,
        maximum=maximum, zero_fraction=zero_fraction,
        saturated_fraction=saturated, saturation_level=level, spikes=spikes,
        excess_area=excess_area, background_rate=float(coef[0]),
        ghost_sources=(), flags=flags)
    return cq, ChannelSummary(bins=bins)


def _mean_std(values: np.ndarray) -> tuple[float, float]:
    """Mean and (population) standard deviation, accumulated in float64."""
    return float(np.mean(values, dtype=np.float64)), float(np.std(values, dtype=np.float64))


def channel_flags(excess_area: float, sbr: float, saturated: float,
                   settings: QualitySettings) -> tuple[str, ...]:
    flags = []
    if excess_area < settings.min_area:
        flags.append("empty")
    if sbr < settings.low_sbr:
        flags.append("low-sbr")
    if saturated > settings.saturated_fraction:
        flags.append("saturated")
    return tuple(flags)


def _suppress_spikes(image: np.ndarray, ratio: float, excess: float) -> tuple[np.ndarray, int]:
    """Set isolated spikes to their neighbourhood level; return a copy and their count.

    The copy is float32 when that holds every value of the input exactly (float32 and
    integers of up to 16 bits: the output values are input values), float64 otherwise.

    A pixel is a spike when it exceeds ``ratio`` times the *second* largest of its
    8 neighbours and that value by at least ``excess``; it is then set to that
    value. Taking the second largest neighbour lets the rule catch two hot pixels
    that happen to touch (common on large images), while anything with two or
    more bright neighbours - a cell, a line one pixel wide - is left alone.
    """
    image = np.ascontiguousarray(image)
    exact32 = image.dtype == np.float32 or (image.dtype.kind in "ui" and image.dtype.itemsize <= 2)
    clean = np.empty(image.shape, np.float32 if exact32 else np.float64)
    n = suppress_spikes(image, float(ratio), float(excess), clean)
    return clean, int(n)


def _split_image(clean: np.ndarray, sigma: float) -> np.ndarray:
    """The image Otsu's threshold is found on: log1p, then a light Gaussian smoothing.

    New arrays of the copy's type (float32 for float32 and 16-bit data, whose values
    it holds exactly; the log is then good to float32 rounding, far finer than a bin of
    Otsu's 256-bin histogram): the log works in place, the smoothing
    (:func:`._kernels.gaussian_reflect`, scipy's Gaussian filter to the bit) into a second one.
    """
    logged = np.empty(clean.shape, clean.dtype)
    np.maximum(clean, 0.0, out=logged)
    np.log1p(logged, out=logged)
    if sigma > 1e-15:  # scipy's gaussian_filter leaves an axis this narrow alone
        # ndimage.gaussian_filter(logged, sigma, mode="reflect", output=logged), bit for bit
        smoothed = np.empty_like(logged)
        gaussian_reflect(logged, gaussian_weights(float(sigma)), smoothed)
        return smoothed
    return logged


@functools.lru_cache(maxsize=16)
def gaussian_weights(sigma: float) -> np.ndarray:
    """The weights ``scipy.ndimage.gaussian_filter`` correlates with (``truncate`` 4, order 0).

    scipy's ``_gaussian_kernel1d(sigma, 0, int(4 * sigma + 0.5))`` reversed, by the same steps.
    """
    radius = int(4.0 * sigma + 0.5)
    x = np.arange(-radius, radius + 1)
    phi = np.exp(-0.5 / (sigma * sigma) * x ** 2)
    weights = np.ascontiguousarray((phi / phi.sum())[::-1], dtype=np.float64)
    weights.setflags(write=False)
    return weights


def _otsu(image: np.ndarray, low: float, high: float) -> float:
    """``skimage.filters.threshold_otsu(image)`` without the copy of the image it makes.

    The same 256-bin histogram over the image's range (``numpy.histogram``, as
    ``skimage.exposure.histogram`` does for float images) is handed to threshold_otsu.
    """
    edges = np.linspace(low, high, 257, endpoint=True, dtype=np.result_type(low, high, image))
    if not np.all(edges[:-1] < edges[1:]):  # a range too narrow for the type: numpy says so
        counts, edges = np.histogram(image, bins=256, range=(low, high))
    else:  # numpy.histogram's bins, counted in one pass without its temporaries
        counts = np.zeros(256, np.int64)
        uniform_histogram(np.ascontiguousarray(image), edges, counts)
    centers = (edges[:-1] + edges[1:]) / 2.0
    if counts.dtype == np.int64 and np.count_nonzero(counts) >= 2:
        # skimage's threshold_otsu steps, compiled (tested against it bit for bit)
        return centers[otsu_index(counts, centers)]
    return threshold_otsu(hist=(counts, centers))


def _saturation_level(dtype, settings: QualitySettings, dtype_max) -> float | None:
    if settings.saturation_level > 0:
        return float(settings.saturation_level)
    if dtype_max is not None:
        return float(dtype_max)
    if dtype is not None and np.issubdtype(np.dtype(dtype), np.integer):
        return float(np.iinfo(np.dtype(dtype)).max)
    return None


def bin_areas(shape, size: int) -> np.ndarray:
    """Pixels per size x size bin of an image of ``shape`` (``_bin_sums`` of ones; read-only,
    kept for the next channel of that shape)."""
    return _bin_areas(int(shape[0]), int(shape[1]), int(size))


@functools.lru_cache(maxsize=32)
def _bin_areas(height: int, width: int, size: int) -> np.ndarray:
    rows = np.minimum(size, height - np.arange(0, height, size))
    columns = np.minimum(size, width - np.arange(0, width, size))
    areas = np.outer(rows, columns).astype(np.float64)
    areas.setflags(write=False)
    return areas


def _bin_sums(values: np.ndarray, size: int) -> np.ndarray:
    """Sums over size x size bins (the last row/column of bins may be partial), in float64:
    :func:`._kernels.bin_sums`, numpy's sums of each band of rows and of its bins to the bit."""
    out = np.empty((-(-values.shape[0] // size), -(-values.shape[1] // size)))
    bin_sums(np.ascontiguousarray(values), int(size), out)
    return out


def _bin_sums_numpy(values: np.ndarray, size: int) -> np.ndarray:
    """:func:`_bin_sums` written with numpy (the form the kernel reproduces; for the tests)."""
    n_rows = -(-values.shape[0] // size)
    columns = np.arange(0, values.shape[1], size)
    out = np.empty((n_rows, columns.size))
    for i in range(n_rows):  # one band of rows at a time: no float64 copy of the image
        band = values[i * size:(i + 1) * size].sum(axis=0, dtype=np.float64)
        out[i] = np.add.reduceat(band, columns)
    return out
