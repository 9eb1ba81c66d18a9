"""Channel quality: SBR, SNR, saturation, empty and striped channels, cohort outliers.

Every channel is measured on its own (:func:`measure_channel`); a whole ROI
(:func:`measure_stack`) adds what needs all channels at once: judging a channel
``empty`` after explaining it as spillover ghosts of the other channels, and
``striped`` rows or columns that drop out across channels. Across a cohort,
:func:`cohort_outliers` flags ROIs whose metric is far from the other ROIs'
(modified z-score). :func:`quality_rows` turns results into rows of the quality
table (``quality.csv``, ``inspect --json``).

How a channel is measured
-------------------------
1. **Isolated spikes** (hot pixels, alone or two touching) are set to the second
   largest of their 8 neighbours when they exceed ``spike_ratio`` times that value
   and by at least ``spike_excess`` counts (a thresholded neighbour rule, as in the
   hot-pixel step, made to catch touching pairs too).
   All metrics below use this spike-free image, so a few hot pixels neither make
   foreground nor dominate the background statistics; their number is reported
   as ``spikes``. ``p50``, ``p99``, ``maximum`` and ``zero_fraction`` describe
   the values as given.
2. **Split**: Otsu's threshold (reference ``skimage.filters.threshold_otsu``) on
   the channel log-scaled with ``log1p`` (negative values count as 0) and then
   smoothed with a Gaussian of ``smoothing_sigma`` pixels. Smoothing after the
   log keeps the boundary of a bright object where it is (the smoothed log edge
   crosses half-way between the two log levels at the true edge).
3. **SBR** = mean(foreground) / max(mean(background), ``background_floor``);
   the floor keeps a zero background (e.g. after speckle removal) from giving an
   infinite ratio. **SNR** = (mean(fg) - mean(bg)) / max(std(bg),
   ``background_floor``) (Murphy, *Fundamentals of Light Microscopy and
   Electronic Imaging*). Without any foreground pixel, SBR = 1 and SNR = 0.
4. **Saturation**: fraction of (spike-free) pixels at or above the saturation
   level (``saturation_level``, else the detector maximum passed as
   ``dtype_max``, else the integer dtype's maximum; none for float data).
5. **Excess test** (behind ``empty``). The spike-free channel is summed in
   ``empty_bin`` x ``empty_bin`` pixel bins. A model of what the channel would
   hold without a stain of its own is fitted to the bins by least squares: a
   flat background ``b`` counts per pixel, plus, in :func:`measure_stack`,
   spillover ghosts - ``s_i`` times every other channel's bins, each
   ``0 <= s_i <= max_ghost`` (a ghost is a near-exact scaled copy of its source,
   pixel by pixel), or the pattern of a known spillover matrix with a fitted
   scale. Bins the current model cannot explain, ``P(N >= n | mu) < fit_alpha``,
   are left out and the fit repeated until the set is stable. A real stain's own
   pattern is left out this way, so the fit follows the lower envelope - the
   part of the channel that is background plus ghosts - even where the stain
   shares cells with a bright channel; for a failed stain almost nothing is left
   out and the fit is the plain least-squares one. Then a bin carries *excess*
   when its count is improbable under the model, ``P(N >= n | mu) <
   empty_alpha`` (Poisson upper tail, via the regularised incomplete gamma
   function), **and** exceeds it by at least ``min_excess`` counts per pixel;
   the same test on 3 x 3-bin windows (leaving out each window's largest single
   excess, so a stray bright bin does not lend excess to its neighbours) finds
   faint stains spread over a cell. The channel is ``empty`` when the bins with
   excess cover fewer than ``min_area`` pixels. The test treats values as
   Poisson counts in units of ``1 / counts_per_unit``.

   Rule of thumb for the defaults (4 x 4 bins, ``empty_alpha = 1e-6``,
   ``min_excess = 0.3``): a stain of 1 count per pixel in cells over a
   background of 0.02-0.3 is found, as are a few bright cells; ghosts of a few
   percent of bright channels (1-5 counts per pixel) and up to a few hundred
   hot pixels are not excess. Measured alone (:func:`measure_channel`) a channel
   is compared with a flat background only, so ghosts there count as signal.
   The test is built for raw counts: on washed stacks (background removed, the
   remainder of subtracted ghosts over-dispersed) pass the raw result as
   ``reference`` to :func:`measure_stack`, so stains empty before stay empty.

Flags
-----
``empty`` (no foreground distinguishable from background and ghosts),
``low-sbr`` (SBR below ``low_sbr``), ``saturated`` (saturated fraction above
``saturated_fraction``), ``striped`` (ROI-level: some rows or columns drop far
below their neighbours across channels), ``outlier`` (added across a cohort by
:func:`add_outlier_flags`). Flags are independent rules; an empty channel may
also be ``low-sbr``.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Iterable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import linalg, ndimage, optimize, special
from skimage.filters import threshold_otsu
from threadpoolctl import threadpool_limits

from . import _quality_kernels as _k
from ._arrays import channel_plane
from .errors import InputError
from .settings import setting

#: Channel-level flags, in the order they are listed.
CHANNEL_FLAGS = ("empty", "low-sbr", "saturated")
#: ROI-level flags (repeated on every channel row of the quality table).
ROI_FLAGS = ("striped",)
#: Cohort-level flag added by :func:`add_outlier_flags`.
OUTLIER_FLAG = "outlier"
#: Separator of flags (and index lists) when written as text, e.g. in ``quality.csv``.
FLAG_SEPARATOR = ";"

# Consistency constant of the modified z-score: 0.6745 = Phi^-1(0.75), so that
# MAD / 0.6745 estimates the standard deviation of normal data (Iglewicz & Hoaglin 1993).
_MAD_CONSTANT = 0.6745
# Used when MAD = 0: mean absolute deviation * 1.253314 (= sqrt(pi / 2)) estimates
# the standard deviation of normal data (common practice).
_MEAN_AD_CONSTANT = 1.253314
# Largest number of refits of the background / ghost model while leaving out bins.
_MAX_FIT_ROUNDS = 12
# Bins per block when Gram matrices are updated (bounds the temporary copies).
_GRAM_BLOCK = 8192
# Largest factor on the ghost pattern of a known spillover matrix.
_KNOWN_SCALE_MAX = 2.0
# Slopes below this are not listed as ghost sources in reports.
_REPORTED_SLOPE = 1e-3


@dataclasses.dataclass(frozen=True)
class QualitySettings:
    """Thresholds of the quality measurements and flags (recipe section ``[quality]``).

    Examples
    --------
    >>> QualitySettings().low_sbr
    3.0
    >>> QualitySettings(low_sbr=5.0).low_sbr
    5.0
    """

    low_sbr: float = setting(
        3.0, "flag low-sbr when the signal-to-background ratio is below this", low=1.0, high=1e6)
    background_floor: float = setting(
        0.01, "smallest background mean and std used in SBR and SNR (guards a zero background)",
        low=0.0, low_open=True, high=1e6)
    smoothing_sigma: float = setting(
        1.0, "Gaussian sigma in pixels applied to the log-scaled channel before the Otsu split",
        low=0.0, high=20.0)
    spike_ratio: float = setting(
        5.0, "a pixel above this times the 2nd largest of its 8 neighbours is a spike (hot pixel)",
        low=1.0, high=1e6)
    spike_excess: float = setting(
        10.0, "... and only when it exceeds that neighbour by at least this many counts",
        low=0.0, high=1e9)
    saturation_level: float = setting(
        0.0, "value counted as saturated; 0 = the detector/dtype maximum (none for float data)",
        low=0.0, high=1e12)
    saturated_fraction: float = setting(
        0.001, "flag saturated when more than this fraction of pixels is at the saturation level",
        low=0.0, high=1.0)
    empty_bin: int = setting(
        4, "side in pixels of the bins the empty test sums counts in", low=1, high=64)
    empty_alpha: float = setting(
        1e-6, "a bin has excess when its count is this improbable under background + ghosts",
        low=0.0, low_open=True, high=0.01)
    fit_alpha: float = setting(
        0.05, "bins this improbable under the current model are left out of the fit",
        low=0.0, low_open=True, high=0.1)
    min_excess: float = setting(
        0.3, "a bin has excess only when it exceeds the model by this many counts per pixel",
        low=0.0, high=1e9)
    min_area: float = setting(
        80.0, "flag empty when bins with excess cover fewer pixels than this", low=1.0, high=1e9)
    ghosts: bool = setting(
        True, "fit each channel as spillover ghosts of the other channels before judging empty")
    max_ghost: float = setting(
        0.1, "largest fraction of another channel's counts that may be explained as its ghost",
        low=0.0, low_open=True, high=1.0)
    counts_per_unit: float = setting(
        1.0, "detector counts per intensity unit (the empty test assumes Poisson counts)",
        low=0.0, low_open=True, high=1e9)
    stripe_drop: float = setting(
        0.5, "flag a row/column striped when it holds below (1 - this) of the lines beside it",
        low=0.0, low_open=True, high=1.0, high_open=True)
    stripe_min_counts: float = setting(
        25.0, "a channel judges a row (column) only when its neighbour lines hold this many counts",
        low=0.0, high=1e12)


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
class StackQuality:
    """Quality of one ROI: per-channel results and ROI-level flags.

    Attributes
    ----------
    channels : tuple of ChannelQuality
        One per channel, in stack order.
    flags : tuple of str
        ROI-level flags (``striped``).
    striped_rows, striped_columns : tuple of int
        Indices of the rows / columns found striped.
    shape : tuple of int
        (C, Y, X) of the stack.
    """

    channels: tuple[ChannelQuality, ...]
    flags: tuple[str, ...]
    striped_rows: tuple[int, ...]
    striped_columns: tuple[int, ...]
    shape: tuple[int, int, int]

    def channel(self, name: str) -> ChannelQuality:
        """The result of the channel called ``name``."""
        for cq in self.channels:
            if cq.name == name:
                return cq
        raise KeyError(name)

    @property
    def names(self) -> list[str | None]:
        """Channel names in stack order."""
        return [cq.name for cq in self.channels]


@dataclasses.dataclass(frozen=True)
class _Summary:
    """What a stack measurement keeps of one channel once its pixels are released."""

    bins: np.ndarray  # (ny, nx) spike-free sums in bins, data units
    rows: np.ndarray  # (3, segments, Y) sums of the stripe test, see _line_sums
    columns: np.ndarray  # (3, segments, X)


# --------------------------------------------------------------------------- public API


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


def measure_channel(image, *, settings: QualitySettings = QualitySettings(), dtype_max=None,
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


def measure_stack(stack, channels: Sequence[str], *, settings: QualitySettings = QualitySettings(),
                  channel_settings: Sequence[QualitySettings] | None = None, dtype_max=None,
                  spillover=None, reference: StackQuality | None = None,
                  threads: int = 1) -> StackQuality:
    """Measure every channel of a ROI and the ROI-level flags.

    Channels are pulled into memory one at a time per thread (a dask stack is
    computed channel by channel), so memory stays at a few copies of one channel plus,
    for the ghost model, every channel summed in bins (``C / empty_bin**2``
    channels' worth).

    ``empty`` is judged after explaining each channel as background plus
    spillover ghosts of the other channels (see the module notes): a failed stain
    that holds only background, hot pixels and faint copies of bright channels is
    ``empty``; a dim stain with a pattern of its own is not.

    Parameters
    ----------
    stack : (C, Y, X) array_like
        numpy or dask array.
    channels : sequence of str
        Channel names, one per plane.
    settings : QualitySettings
        Thresholds (the ROI-level ones, ``stripe_*``, come from here).
    channel_settings : sequence of QualitySettings, optional
        Per-channel thresholds (e.g. ``Recipe.for_channels("quality", names)``);
        default: ``settings`` for every channel.
    dtype_max : float, optional
        Detector or original dtype maximum, as in :func:`measure_channel`.
    spillover : (C, C) array_like, optional
        Known spillover matrix (entry (i, j) = fraction of channel i measured in
        channel j). When given, each channel's ghost pattern is fixed by its column
        (only its overall scale, 0 to 2, is fitted) instead of fitting every
        fraction; it is used even when ``ghosts`` is false.
    reference : StackQuality, optional
        The same ROI measured before cleaning (the ``raw`` stage). Channels empty
        there stay empty here: a wash removes signal, it cannot create a stain.
        Pass it when measuring the ``washed`` stage: after compensation and speckle
        removal the background is gone and the remainder of subtracted ghosts is
        no longer Poisson, so the excess test alone over-reads it.
    threads : int, optional
        Threads for the channels' measurements and the ghost fits; the results do not
        depend on it. Fewer channels are measured at once when their copies would
        exceed ``QUALITY_WORKING_BYTES`` (see :func:`channel_threads`).

    Returns
    -------
    StackQuality

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> bright = np.zeros((96, 96)); bright[20:70, 20:70] = 80.0
    >>> truth = np.stack([bright, np.zeros((96, 96))])
    >>> mean = truth.copy(); mean[1] = 0.1 + 0.03 * bright   # channel 1: a ghost only
    >>> stack = rng.poisson(mean).astype(np.uint16)
    >>> sq = measure_stack(stack, ["A", "B"])
    >>> [cq.empty for cq in sq.channels], sq.channel("B").ghost_sources[0][0]
    ([False, True], 'A')
    """
    shape = tuple(int(n) for n in np.shape(stack))
    if len(shape) != 3:
        raise InputError("stack", f"expected a (C, Y, X) stack, got shape {shape}")
    names = [str(c) for c in channels]
    if len(names) != shape[0]:
        raise InputError("channels", f"{len(names)} names for a stack of {shape[0]} channels")
    if channel_settings is None:
        per_channel = [settings] * shape[0]
    else:
        per_channel = list(channel_settings)
        if len(per_channel) != shape[0]:
            raise InputError("channel_settings",
                             f"{len(per_channel)} settings for a stack of {shape[0]} channels")
    if len({s.empty_bin for s in per_channel}) > 1:
        raise InputError("quality.empty_bin", "must be the same for every channel of a ROI")
    if reference is not None and reference.names != names:
        raise InputError("reference", "measured with other channels than this stack")
    matrix = None
    if spillover is not None:
        matrix = np.asarray(spillover, dtype=np.float64)
        if matrix.shape != (shape[0], shape[0]):
            raise InputError("spillover", f"matrix is {matrix.shape}, the stack has {shape[0]} "
                             "channels")
        if not np.all(np.isfinite(matrix)) or np.any(matrix < 0):
            raise InputError("spillover", "matrix holds negative or non-finite values")

    # bin areas, then each channel's bin sums: what the ghost model needs
    bin_size = per_channel[0].empty_bin
    areas = _bin_areas(shape[1:], bin_size)
    # float32 rows (counts binned from data of up to 16 bits are exact; the fits convert a
    # block of bins at a time to float64), so the model costs 4 bytes per bin per channel
    design = np.empty((shape[0] + 1, areas.size), np.float32)
    design[0] = areas.ravel()

    def one(c):
        # the plane read from a lazy stack is released as soon as its spike-free copy exists
        prepared = _prepare(channel_plane(stack, c), per_channel[c], names[c],
                            dtype=getattr(stack, "dtype", None))
        cq, summary = _measure_prepared(prepared, per_channel[c], dtype_max, names[c])
        design[c + 1] = summary.bins.ravel()
        return cq, summary.rows, summary.columns

    measured = _map_threads(one, range(shape[0]), channel_threads(shape[1:], threads))
    results = [m[0] for m in measured]
    row_sums = [m[1] for m in measured]
    column_sums = [m[2] for m in measured]

    # The ghost fits are many small products: one BLAS thread is fastest, and
    # keeps a threaded BLAS from fighting other work for the cores.
    with threadpool_limits(limits=1, user_api="blas"):
        results = _judge_with_ghosts(results, design, areas.shape, per_channel, matrix,
                                     threads=threads)
    if reference is not None:
        results = [_inherit_empty(cq, ref) for cq, ref in zip(results, reference.channels,
                                                               strict=True)]
    rows = _striped_lines(np.stack(row_sums).astype(np.float64), settings)
    columns = _striped_lines(np.stack(column_sums).astype(np.float64), settings)
    flags = ("striped",) if rows or columns else ()
    return StackQuality(channels=tuple(results), flags=flags, striped_rows=rows,
                        striped_columns=columns, shape=shape)


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


def quality_rows(stack_quality: StackQuality, *, roi: str, stage: str,
                 join_flags: bool = False) -> list[dict]:
    """Rows of the quality table for one ROI and stage (``raw`` / ``washed``).

    Each row has ``roi, channel, stage, sbr, snr, flags`` first, then the other
    metrics of :class:`ChannelQuality`, then ``striped_rows`` and
    ``striped_columns`` (the ROI's line indices). ``flags`` holds the channel's
    flags followed by the ROI-level flags, as a list (ready for ``inspect
    --json``) or, with ``join_flags=True``, as one ``';'``-joined string (for
    ``quality.csv``; the index lists are joined the same way). ``ghost_sources``
    is text ``"name:fraction"`` joined by ``';'``. Values are plain Python
    numbers and strings, JSON-ready: an undefined metric (e.g. ``foreground_snr``
    without foreground) is None (an empty cell in CSV).

    Examples
    --------
    >>> rng = np.random.default_rng(2)
    >>> stack = rng.poisson(0.1, (1, 64, 64)).astype(np.uint16)
    >>> rows = quality_rows(measure_stack(stack, ["Nd145"]), roi="roi_01", stage="raw")
    >>> rows[0]["channel"], rows[0]["flags"]
    ('Nd145', ['empty'])
    """
    out = []
    for cq in stack_quality.channels:
        flags = list(cq.flags) + [f for f in stack_quality.flags if f not in cq.flags]
        rows = list(stack_quality.striped_rows)
        columns = list(stack_quality.striped_columns)
        ghosts = FLAG_SEPARATOR.join(f"{n}:{s:.4g}" for n, s in cq.ghost_sources)
        row = {"roi": str(roi), "channel": cq.name, "stage": str(stage),
               "sbr": _plain(cq.sbr), "snr": _plain(cq.snr),
               "flags": FLAG_SEPARATOR.join(flags) if join_flags else flags}
        for field in dataclasses.fields(ChannelQuality):
            if field.name in row or field.name in ("name", "flags", "ghost_sources"):
                continue
            row[field.name] = _plain(getattr(cq, field.name))
        row["ghost_sources"] = ghosts
        row["striped_rows"] = (FLAG_SEPARATOR.join(map(str, rows)) if join_flags else rows)
        row["striped_columns"] = (FLAG_SEPARATOR.join(map(str, columns)) if join_flags
                                  else columns)
        out.append(row)
    return out


# --------------------------------------------------------------------------- one channel


def _measure(image, settings: QualitySettings, dtype_max, name, *, dtype=None):
    """Measure one channel; returns its ChannelQuality and what the stack needs later."""
    return _measure_prepared(_prepare(image, settings, name, dtype=dtype), settings, dtype_max,
                             name)


def _prepare(image, settings: QualitySettings, name, *, dtype=None) -> dict:
    """Check a channel, take the statistics of its values as given and its spike-free copy.

    Split from the rest so that the caller's reference to the pixels as given (a plane
    read from a lazy stack) is gone before the copies the split needs are made.
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
    p50, p99 = (float(v) for v in np.percentile(raw, [50.0, 99.0]))
    maximum = float(raw.max())
    zero_fraction = float(np.count_nonzero(raw == 0)) / raw.size
    clean, spikes = _suppress_spikes(raw, settings.spike_ratio, settings.spike_excess)
    return {"clean": clean, "spikes": spikes, "p50": p50, "p99": p99, "maximum": maximum,
            "zero_fraction": zero_fraction, "dtype": dtype}


def _measure_prepared(prepared: dict, settings: QualitySettings, dtype_max, name):
    """The rest of :func:`_measure`, from the spike-free copy (``prepared`` is emptied)."""
    clean = prepared.pop("clean")
    spikes, dtype = prepared["spikes"], prepared["dtype"]
    p50, p99, maximum = prepared["p50"], prepared["p99"], prepared["maximum"]
    zero_fraction = prepared["zero_fraction"]

    smoothed = _split_image(clean, settings.smoothing_sigma)
    low, high = float(smoothed.min()), float(smoothed.max())
    if high > low:
        t_log = float(_otsu(smoothed, low, high))
    else:
        t_log = high
    foreground = smoothed > t_log
    del smoothed
    n_fg = int(np.count_nonzero(foreground))
    floor = settings.background_floor
    if 0 < n_fg < clean.size:
        fg_mean, fg_std = _masked_mean_std(clean, foreground, True)
        bg_mean, bg_std = _masked_mean_std(clean, foreground, False)
        sbr = fg_mean / max(bg_mean, floor)
        snr = (fg_mean - bg_mean) / max(bg_std, floor)
        fg_snr = _mean_over_std(fg_mean, fg_std)
    else:  # nothing stands out: the whole channel is background
        fg_mean = bg_mean = float(clean.mean(dtype=np.float64))
        bg_std = float(clean.std(dtype=np.float64))
        sbr, snr, fg_snr = 1.0, 0.0, math.nan
        n_fg = 0
    del foreground

    level = _saturation_level(dtype, settings, dtype_max)
    saturated = 0.0 if level is None else float(np.count_nonzero(clean >= level)) / clean.size

    bins = _bin_sums(clean, settings.empty_bin)
    area = _bin_areas(clean.shape, settings.empty_bin)
    mu, coef, _ = _fit_model(bins.ravel(), area.ravel()[None, :], np.array([np.inf]), settings)
    excess_area = _excess_area(bins * settings.counts_per_unit, mu.reshape(bins.shape), area,
                               settings)
    flags = _channel_flags(excess_area, sbr, saturated, settings)
    cq = ChannelQuality(
        name=name, sbr=sbr, snr=snr, foreground_fraction=n_fg / clean.size,
        foreground_mean=fg_mean, background_mean=bg_mean, background_std=bg_std,
        foreground_snr=fg_snr, threshold=float(np.expm1(t_log)), p50=p50, p99=p99,
        maximum=maximum, zero_fraction=zero_fraction,
        saturated_fraction=saturated, saturation_level=level, spikes=spikes,
        excess_area=excess_area, background_rate=float(coef[0]),
        ghost_sources=(), flags=flags)
    # the stripe sums of every channel are kept until the end: float32 halves them
    summary = _Summary(bins=bins, rows=_line_sums(clean).astype(np.float32),
                       columns=_line_sums(clean.T).astype(np.float32))
    return cq, summary


def _masked_mean_std(values: np.ndarray, mask: np.ndarray, inside: bool) -> tuple[float, float]:
    """Mean and standard deviation of the pixels where ``mask == inside``, without copies."""
    mean, std = _k.masked_mean_std(values, mask, inside)
    return float(mean), float(std)


def _channel_flags(excess_area: float, sbr: float, saturated: float,
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
    n = _k.suppress_spikes(image, float(ratio), float(excess), clean)
    return clean, int(n)


def _split_image(clean: np.ndarray, sigma: float) -> np.ndarray:
    """The image Otsu's threshold is found on: log1p, then a light Gaussian smoothing.

    One new array of the copy's type (float32 for float32 and 16-bit data, whose values
    it holds exactly; the log is then good to float32 rounding, far finer than a bin of
    Otsu's 256-bin histogram): the log and the smoothing work in place (the smoothing
    is separable and scipy filters each line from a copy, as it does between its own
    axes).
    """
    logged = np.empty(clean.shape, clean.dtype)
    np.maximum(clean, 0.0, out=logged)
    np.log1p(logged, out=logged)
    if sigma > 0:
        ndimage.gaussian_filter(logged, sigma, mode="reflect", output=logged)
    return logged


def _otsu(image: np.ndarray, low: float, high: float) -> float:
    """``skimage.filters.threshold_otsu(image)`` without the copy of the image it makes.

    The same 256-bin histogram over the image's range (``numpy.histogram``, as
    ``skimage.exposure.histogram`` does for float images) is handed to threshold_otsu.
    """
    counts, edges = np.histogram(image, bins=256, range=(low, high))
    return threshold_otsu(hist=(counts, (edges[:-1] + edges[1:]) / 2.0))


def _saturation_level(dtype, settings: QualitySettings, dtype_max) -> float | None:
    if settings.saturation_level > 0:
        return float(settings.saturation_level)
    if dtype_max is not None:
        return float(dtype_max)
    if dtype is not None and np.issubdtype(np.dtype(dtype), np.integer):
        return float(np.iinfo(np.dtype(dtype)).max)
    return None


def _bin_areas(shape, size: int) -> np.ndarray:
    """Pixels per size x size bin of an image of ``shape`` (``_bin_sums`` of ones)."""
    rows = np.minimum(size, shape[0] - np.arange(0, shape[0], size))
    columns = np.minimum(size, shape[1] - np.arange(0, shape[1], size))
    return np.outer(rows, columns).astype(np.float64)


def _bin_sums(values: np.ndarray, size: int) -> np.ndarray:
    """Sums over size x size bins (the last row/column of bins may be partial)."""
    n_rows = -(-values.shape[0] // size)
    columns = np.arange(0, values.shape[1], size)
    out = np.empty((n_rows, columns.size))
    for i in range(n_rows):  # one band of rows at a time: no float64 copy of the image
        band = values[i * size:(i + 1) * size].sum(axis=0, dtype=np.float64)
        out[i] = np.add.reduceat(band, columns)
    return out


# --------------------------------------------------------------------------- the excess test


def _poisson_tail_below(n: np.ndarray, mu: np.ndarray, alpha: float) -> np.ndarray:
    """Where ``P(N >= n) < alpha`` for N ~ Poisson(mu) (``alpha`` below 0.159).

    ``P(N >= n)`` is the regularised lower incomplete gamma ``P(n, mu)``
    (``scipy.special.gammainc``), which interpolates smoothly for non-integer counts
    (compensated data). Only the bins the answer is not obvious for pay for it:

    * ``n <= mu + sqrt(mu)``: ``P >= 0.159 > alpha`` (checked numerically for
      1e-3 <= mu <= 1e5), so not below;
    * the Chernoff bound ``P(n, mu) <= exp(-(n log(n / mu) - n + mu))`` for ``n > mu``
      (the lower tail of a Gamma(n) variable; it holds for non-integer n too) is
      already below ``alpha``: below. These are the bright bins of a stain, most of
      a stained channel's bins;
    * the series ``P(n, mu) = mu^n e^-mu / Gamma(n + 1) * (1 + mu / (n + 1) + mu^2 /
      ((n + 1)(n + 2)) + ...)`` (Abramowitz & Stegun 6.5.29), cut after three terms, is a
      lower bound; where it is at least ``alpha``: not below. These are the background
      bins that fluctuate up;
    * the rest: ``gammainc`` itself.

    The answer is that of ``gammainc(n, mu) < alpha`` everywhere (the bounds keep a
    margin far above their rounding).
    """
    n = np.ascontiguousarray(n, dtype=np.float64)
    mu = np.ascontiguousarray(np.broadcast_to(mu, n.shape), dtype=np.float64)
    verdict = np.empty(n.shape, np.int8)
    _k.poisson_tail_screen(n.ravel(), mu.ravel(), math.log(alpha), verdict.ravel())
    out = verdict == 1
    hard = verdict == 2
    if hard.any():
        out[hard] = special.gammainc(n[hard], mu[hard]) < alpha
    return out


def _fit_model(target: np.ndarray, design: np.ndarray, upper: np.ndarray,
               settings: QualitySettings, *, gram: np.ndarray | None = None,
               cross: np.ndarray | None = None):
    """Fit target ~ design.T @ coef, leaving out bins the model cannot explain.

    ``design`` row 0 holds the bins' areas (its coefficient is the background per
    pixel, >= 0, unbounded above), the other rows the sources (coefficients
    ``0 <= s_i <= upper_i``; an upper bound of 0 leaves a row out). Least squares on
    the bins kept; bins with ``P(N >= n | mu) < fit_alpha`` (counts ``n`` and
    ``mu`` = values times ``counts_per_unit``) are left out and the fit repeated
    until the set is stable. ``gram`` / ``cross`` (``design @ design.T`` and
    ``design @ target`` over all bins) may be passed precomputed; between rounds
    they are updated with the bins that changed side only.

    Returns mu (model counts per bin, floored), the coefficients (in the data's
    units) and the mask of bins kept.
    """
    unit = settings.counts_per_unit
    if gram is None:
        gram = _gram(design)
        cross = _cross(design, target)
    n = target * unit
    floor = settings.background_floor * unit * design[0].astype(np.float64)
    kept = np.ones(n.shape, bool)
    lower = np.zeros(design.shape[0])
    g, h = gram, cross
    for _ in range(_MAX_FIT_ROUNDS):
        coef = _box_least_squares(g, h, lower, upper)
        mu = np.maximum(unit * _combine(coef, design), floor)
        new_kept = ~_poisson_tail_below(n, mu, settings.fit_alpha)
        if not new_kept.any() or np.array_equal(new_kept, kept):
            break
        g_out, h_out = _partial_gram(design, target, kept & ~new_kept)
        g_in, h_in = _partial_gram(design, target, new_kept & ~kept)
        g, h = g - g_out + g_in, h - h_out + h_in
        kept = new_kept
    return mu, coef, kept


def _gram(design: np.ndarray) -> np.ndarray:
    """``D D^T`` in float64, a block of bins (columns) at a time."""
    g = np.zeros((design.shape[0], design.shape[0]))
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        d = design[:, start:start + _GRAM_BLOCK].astype(np.float64)
        g += d @ d.T
    return g


def _cross(design: np.ndarray, target: np.ndarray) -> np.ndarray:
    """``D t`` in float64, a block of bins at a time."""
    h = np.zeros(design.shape[0])
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        h += design[:, start:start + _GRAM_BLOCK].astype(np.float64) @ target[start:start + _GRAM_BLOCK]
    return h


def _combine(coef: np.ndarray, design: np.ndarray) -> np.ndarray:
    """``coef @ design`` in float64, a block of columns at a time (no float64 copy of ``design``)."""
    out = np.empty(design.shape[1])
    for start in range(0, design.shape[1], _GRAM_BLOCK):
        out[start:start + _GRAM_BLOCK] = coef @ design[:, start:start + _GRAM_BLOCK].astype(np.float64)
    return out


def _partial_gram(design: np.ndarray, target: np.ndarray, mask: np.ndarray):
    """``D D^T`` and ``D t`` over the bins in ``mask``, a block of bins at a time."""
    index = np.flatnonzero(mask)
    g = np.zeros((design.shape[0], design.shape[0]))
    h = np.zeros(design.shape[0])
    for start in range(0, index.size, _GRAM_BLOCK):
        part = index[start:start + _GRAM_BLOCK]
        d = design[:, part].astype(np.float64)
        g += d @ d.T
        h += d @ target[part]
    return g, h


def _box_least_squares(gram: np.ndarray, cross: np.ndarray, lower: np.ndarray,
                       upper: np.ndarray) -> np.ndarray:
    """argmin c^T G c - 2 c^T h subject to lower <= c <= upper (G = D D^T, h = D n).

    Variables with ``upper <= lower`` are fixed at ``lower``; the others are
    solved as the equivalent bounded least-squares problem ||L^T c - L^-1 h||
    (G = L L^T) with ``scipy.optimize.lsq_linear`` (BVLS), on a diagonally scaled
    G with a tiny ridge so that dependent or all-zero sources do no harm.
    """
    coef = lower.astype(np.float64).copy()
    free = (upper > lower) & (np.diag(gram) > 0)
    if not free.any():
        return coef
    idx = np.flatnonzero(free)
    fixed = np.flatnonzero(~free)
    h = cross[idx] - gram[np.ix_(idx, fixed)] @ coef[fixed]
    scale = np.sqrt(np.diag(gram)[idx])
    g = gram[np.ix_(idx, idx)] / np.outer(scale, scale)
    g[np.diag_indices_from(g)] += 1e-9
    h = h / scale
    lo = lower[idx] * scale
    hi = upper[idx] * scale
    if len(idx) == 1:  # one unknown: clip the unconstrained minimum
        coef[idx] = np.clip(h / g[0, 0], lo, hi) / scale
        return coef
    chol = linalg.cholesky(g, lower=True)
    rhs = linalg.solve_triangular(chol, h, lower=True)
    result = optimize.lsq_linear(chol.T, rhs, bounds=(lo, hi), method="bvls")
    coef[idx] = result.x / scale
    return coef


def _excess_area(n: np.ndarray, mu: np.ndarray, area: np.ndarray,
                 settings: QualitySettings) -> float:
    """Pixels of the bins with excess over the model, judged per bin and per 3 x 3 bins.

    The window test adds power for faint stains spread over several bins; the
    largest single-bin excess in a window is left out of it, so one stray bright
    bin (a hot pixel that escaped) cannot lend excess to its eight neighbours.
    """
    unit = settings.counts_per_unit
    excess = _poisson_tail_below(n, mu, settings.empty_alpha) & (
        n - mu >= settings.min_excess * unit * area)
    if min(n.shape) >= 3:
        n_w, mu_w, a_w = (ndimage.uniform_filter(v, 3, mode="constant") * 9 for v in (n, mu, area))
        largest = ndimage.maximum_filter(n - mu, 3, mode="constant", cval=0.0)
        n_w = n_w - np.maximum(largest, 0.0)
        excess |= _poisson_tail_below(n_w, mu_w, settings.empty_alpha) & (
            n_w - mu_w >= settings.min_excess * unit * a_w)
    return float(area[excess].sum())


def _inherit_empty(cq: ChannelQuality, reference: ChannelQuality) -> ChannelQuality:
    """``cq`` flagged empty when its reference (the channel before cleaning) is."""
    if not reference.empty or cq.empty:
        return cq
    flags = tuple(f for f in CHANNEL_FLAGS if f == "empty" or f in cq.flags)
    return dataclasses.replace(cq, flags=flags)


def _judge_with_ghosts(results: list[ChannelQuality], design: np.ndarray, shape,
                       per_channel: list[QualitySettings], matrix, *, threads: int = 1
                       ) -> list[ChannelQuality]:
    """Redo the excess test of every channel with ghosts of the other channels in the model.

    ``design`` holds the bins' areas, then every channel's bin sums (data units),
    one row each; ``shape`` is the shape of the bin grid.
    """
    if len(results) < 2:
        return results
    gram = _gram(design)
    names = [cq.name for cq in results]

    def judge(c):
        cq, s = results[c], per_channel[c]
        # ghosts only explain more of a channel: one already empty stays empty
        if cq.empty or (not s.ghosts and matrix is None):
            return cq
        return _ghost_test(c, cq, design, gram, shape, names, s, matrix)

    return _map_threads(judge, range(len(results)), threads)


def _map_threads(function, items, threads: int) -> list:
    """``[function(i) for i in items]``, on ``threads`` threads when more than one."""
    items = list(items)
    if threads <= 1 or len(items) <= 1:
        return [function(i) for i in items]
    with ThreadPoolExecutor(min(threads, len(items)), thread_name_prefix="plexwash-quality") as pool:
        return list(pool.map(function, items))


#: Bytes the per-channel measurements may hold at once; one needs about
#: ``CHANNEL_COPIES`` float32 copies of its channel (the raw plane, its spike-free copy
#: and the float64 image Otsu's threshold is found on).
QUALITY_WORKING_BYTES = 128 * 2**20
CHANNEL_COPIES = 6


def channel_threads(plane_shape, threads: int) -> int:
    """Channels measured at once: ``threads``, fewer when their copies would exceed the budget.

    Examples
    --------
    >>> channel_threads((1000, 1000), 2), channel_threads((2000, 2000), 2)
    (2, 1)
    """
    per_channel = CHANNEL_COPIES * 4 * int(np.prod(plane_shape))
    return int(max(1, min(threads, QUALITY_WORKING_BYTES // max(per_channel, 1))))


def _ghost_test(c: int, cq: ChannelQuality, design: np.ndarray, gram: np.ndarray, shape,
                names: list, settings: QualitySettings, matrix) -> ChannelQuality:
    """Excess test of channel c with the other channels' ghosts in the model."""
    target = design[c + 1].astype(np.float64)
    areas = design[0].astype(np.float64)
    others = [i for i in range(len(names)) if i != c]
    if matrix is not None:
        # The known matrix fixes the ghost pattern; its overall scale is fitted
        # (0 .. _KNOWN_SCALE_MAX): measured sources carry their own background and
        # spillover, so the pattern is a little off in scale, never in shape.
        weights = np.array(matrix[:, c], dtype=np.float64)
        weights[c] = 0.0  # a channel is no ghost of itself (no copy of the other rows)
        ghost = _combine(weights, design[1:])
        mu, coef, _ = _fit_model(target, np.vstack([areas, ghost]),
                                 np.array([np.inf, _KNOWN_SCALE_MAX]), settings)
        slopes = matrix[others, c] * coef[1]
    else:
        upper = np.full(design.shape[0], settings.max_ghost)
        upper[0] = np.inf
        upper[c + 1] = 0.0  # a channel is no ghost of itself
        mu, coef, _ = _fit_model(target, design, upper, settings, gram=gram,
                                 cross=gram[:, c + 1])
        slopes = coef[[i + 1 for i in others]]
    area = areas.reshape(shape)
    excess_area = _excess_area(target.reshape(shape) * settings.counts_per_unit,
                               mu.reshape(shape), area, settings)
    ghost_sources = tuple(sorted(((names[i], float(v)) for i, v in zip(others, slopes, strict=True)
                                  if v >= _REPORTED_SLOPE), key=lambda p: -p[1]))
    flags = _channel_flags(excess_area, cq.sbr, cq.saturated_fraction, settings)
    return dataclasses.replace(cq, excess_area=excess_area, flags=flags,
                               background_rate=float(coef[0]), ghost_sources=ghost_sources)


# --------------------------------------------------------------------------- stripes


def _line_sums(image: np.ndarray) -> np.ndarray:
    """Per row of ``image``: the sums the stripe test needs, shape (3, segments, rows).

    With ``a`` the row, ``nb`` the mean of the rows next to it (distance 1) and
    ``w`` the mean of the rows at distance 2 (one side only at the image edges),
    the row is cut into :func:`_segments` equal parts and each part gives
    ``sum(a (w + m))``, ``sum(nb (w + m))`` and ``sum(nb)``, ``m`` being the part's
    mean of ``w``.
    """
    def beside(part, d):
        total = np.zeros(part.shape)
        count = np.zeros((part.shape[0], 1))
        if part.shape[0] > d:
            total[d:] += part[:-d]
            total[:-d] += part[d:]
            count[d:] += 1
            count[:-d] += 1
        total /= np.maximum(count, 1)
        return total

    edges = _segments(image.shape[1])
    out = np.empty((3, len(edges) - 1, image.shape[0]))
    for k, (start, stop) in enumerate(zip(edges[:-1], edges[1:], strict=True)):
        part = image[:, start:stop]  # one part at a time keeps the temporaries small
        weight = beside(part, 2)
        weight += weight.mean(axis=1, keepdims=True)
        near = beside(part, 1)
        out[0, k] = np.einsum("ij,ij->i", part, weight)
        out[1, k] = np.einsum("ij,ij->i", near, weight)
        out[2, k] = near.sum(axis=1)
    return out


def _segments(length: int) -> np.ndarray:
    """Edges of the parts a line is cut into: about 64 px or more each, at most 4."""
    n = int(min(4, max(1, length // 64)))
    return np.linspace(0, length, n + 1).astype(int)


def _striped_lines(sums: np.ndarray, settings: QualitySettings) -> tuple[int, ...]:
    """Lines whose intensity drops below (1 - stripe_drop) of their neighbours', across channels.

    For each channel, the line ``a`` is compared pixel by pixel with the mean
    ``nb`` of the two lines beside it, weighting pixels by ``w + mean(w)`` where
    ``w`` is the mean of the lines two away: ``ratio = sum(a (w + m)) / sum(nb (w
    + m))``. Weights from lines that are neither ``a`` nor ``nb`` keep Poisson
    noise from biasing the ratio, and weighting where the tissue is bright makes
    the ratio about 1 wherever cells simply continue across lines; a line
    drop-out (every pixel of one or two lines scaled down) gives a ratio near its
    scale factor (about twice it for two adjacent lines). The ratio is taken in
    each part of the line (:func:`_segments`) and in each channel whose
    neighbour lines hold at least ``stripe_min_counts`` counts; a line is
    striped when, in *every* part, the median ratio over those channels is
    below ``1 - stripe_drop``: a drop-out spans the whole line, a natural gap
    between cells does not. The first and last lines (neighbours on one side
    only, where the image edge cuts cells) are not judged. ``sums`` is
    (C, 3, segments, L) from :func:`_line_sums`.
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
    striped = judged & (highest < 1.0 - settings.stripe_drop)
    return tuple(int(i) for i in np.flatnonzero(striped))


# --------------------------------------------------------------------------- small helpers


def _as_float(value) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _plain(value):
    """A plain Python number for JSON and CSV; NaN and infinity become None."""
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    value = float(value)
    return value if math.isfinite(value) else None


def _add_flag(flags, flag: str):
    if isinstance(flags, str):
        parts = [f for f in flags.split(FLAG_SEPARATOR) if f]
        return FLAG_SEPARATOR.join(parts if flag in parts else parts + [flag])
    parts = list(flags or [])
    return parts if flag in parts else parts + [flag]
