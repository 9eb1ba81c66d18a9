"""One ROI: every channel, ``empty`` judged with spillover ghosts explained, ``striped`` lines."""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from threadpoolctl import threadpool_limits

from .._arrays import channel_plane
from ..errors import InputError
from .channel import ChannelQuality, bin_areas, channel_flags, measure_prepared, prepare_channel
from .excess import combine_rows, fit_model, gram_matrix, measure_excess_area
from .settings import CHANNEL_FLAGS, DEFAULT_QUALITY, QualitySettings


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


# Largest factor on the ghost pattern of a known spillover matrix.
_KNOWN_SCALE_MAX = 2.0


# Slopes below this are not listed as ghost sources in reports.
_REPORTED_SLOPE = 1e-3


def measure_stack(stack, channels: Sequence[str], *, settings: QualitySettings = DEFAULT_QUALITY,
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
    areas = bin_areas(shape[1:], bin_size)
    # float32 rows (counts binned from data of up to 16 bits are exact; the fits convert a
    # block of bins at a time to float64), so the model costs 4 bytes per bin per channel
    design = np.empty((shape[0] + 1, areas.size), np.float32)
    design[0] = areas.ravel()

    def one(c):
        # the plane read from a lazy stack is released as soon as its spike-free copy exists
        prepared = prepare_channel(channel_plane(stack, c), per_channel[c], names[c],
                            dtype=getattr(stack, "dtype", None))
        cq, summary = measure_prepared(prepared, per_channel[c], dtype_max, names[c])
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
    gram = gram_matrix(design)
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
        ghost = combine_rows(weights, design[1:])
        mu, coef, _ = fit_model(target, np.vstack([areas, ghost]),
                                 np.array([np.inf, _KNOWN_SCALE_MAX]), settings)
        slopes = matrix[others, c] * coef[1]
    else:
        upper = np.full(design.shape[0], settings.max_ghost)
        upper[0] = np.inf
        upper[c + 1] = 0.0  # a channel is no ghost of itself
        mu, coef, _ = fit_model(target, design, upper, settings, gram=gram,
                                 cross=gram[:, c + 1])
        slopes = coef[[i + 1 for i in others]]
    area = areas.reshape(shape)
    excess_area = measure_excess_area(target.reshape(shape) * settings.counts_per_unit,
                               mu.reshape(shape), area, settings)
    ghost_sources = tuple(sorted(((names[i], float(v)) for i, v in zip(others, slopes, strict=True)
                                  if v >= _REPORTED_SLOPE), key=lambda p: -p[1]))
    flags = channel_flags(excess_area, cq.sbr, cq.saturated_fraction, settings)
    return dataclasses.replace(cq, excess_area=excess_area, flags=flags,
                               background_rate=float(coef[0]), ghost_sources=ghost_sources)


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
