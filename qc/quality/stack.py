"""One ROI: every channel, ``empty`` judged with spillover ghosts explained, ``striped`` lines."""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .._arrays import channel_plane
from .._threads import one_thread
from ..errors import InputError
from .channel import ChannelQuality, bin_areas, measure_prepared, prepare_channel
from .excess import WideDesign, gram_matrix
from .ghosts import GhostModel, ghost_test
from .regions import away_from_edges, binned_tissue, has_glass, roi_tissue, summed_channels
from .settings import CHANNEL_FLAGS, DEFAULT_QUALITY, QualitySettings
from .stripes import loud_pixels, quiet_keep, stripe_counts, striped_lines


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
    tissue : (Y, X) bool array or None
        The tissue mask SBR, SNR and the empty test's backgrounds were measured with
        (all True: no glass found); None when ``in_tissue`` is off.
    """

    channels: tuple[ChannelQuality, ...]
    flags: tuple[str, ...]
    striped_rows: tuple[int, ...]
    striped_columns: tuple[int, ...]
    shape: tuple[int, int, int]
    tissue: np.ndarray | None = dataclasses.field(default=None, compare=False, repr=False)

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


def measure_stack(stack, channels: Sequence[str], *, settings: QualitySettings = DEFAULT_QUALITY,
                  channel_settings: Sequence[QualitySettings] | None = None, dtype_max=None,
                  spillover=None, reference: StackQuality | None = None,
                  threads: int = 1, tissue=None) -> StackQuality:
    """Measure every channel of a ROI and the ROI-level flags.

    Channels are pulled into memory one at a time per thread (a dask stack is
    computed channel by channel), so memory stays at a few copies of one channel plus,
    for the ghost model, every channel summed in bins (``C / empty_bin**2``
    channels' worth).

    ``empty`` is judged after explaining each channel as background plus
    spillover ghosts of the other channels (see the module notes and :mod:`.ghosts`):
    a failed stain that holds only background, hot pixels and faint copies of bright
    channels is ``empty``; a dim stain with a pattern of its own is not. With
    ``in_tissue`` (the default), SBR and SNR are measured inside the tissue and the
    background has one rate on glass and one in tissue (:mod:`.regions`). ``striped``
    lines need a drop across channels and a significant one under Poisson counts
    (:mod:`.stripes`).

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
        no longer Poisson, so the excess test alone over-reads it. Its tissue mask and
        striped lines are taken over too: a wash neither creates nor repairs a line
        drop-out, and without background the quiet pixels the stripe test needs are gone.
    threads : int, optional
        Threads for the channels' measurements and the ghost fits; the results do not
        depend on it. Fewer channels are measured at once when their copies would
        exceed ``QUALITY_WORKING_BYTES`` (see :func:`channel_threads`).
    tissue : (Y, X) bool array, optional
        The ROI's tissue mask when the caller has it; default: the reference's, else
        :func:`.regions.roi_tissue` of the summed channels (summed in one more pass over
        them, which the stripe test needs too).

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

    # one pass over the channels: their sum (the tissue mask) and loud pixels (stripe test)
    # (the order statistics the loud pixels select are kept for each channel's percentiles)
    memos = [{} for _ in range(shape[0])]
    total, loud = (summed_channels(stack, lambda plane, c: loud_pixels(plane, memos[c]))
                   if reference is None else (None, None))
    tissue = _tissue(total, shape, settings, tissue, reference)
    del total
    inside = tissue if has_glass(tissue) else None
    keeps = None
    if loud is not None:
        away = away_from_edges(inside)
        keeps = (quiet_keep(loud, away),
                 np.ascontiguousarray(quiet_keep(loud.T, None if away is None else away.T)))
        del loud, away

    # bin areas (per region when the ROI has glass), then each channel's bin sums: what the
    # ghost model needs
    bin_size = per_channel[0].empty_bin
    areas = bin_areas(shape[1:], bin_size)
    k = 1 if inside is None else 2
    # float32 rows (counts binned from data of up to 16 bits are exact; the fits convert a
    # block of bins at a time to float64), so the model costs 4 bytes per bin per channel
    design = np.empty((shape[0] + k, areas.size), np.float32)
    if inside is None:
        design[0] = areas.ravel()
    else:
        in_tissue = binned_tissue(inside, bin_size)
        design[0], design[1] = (areas - in_tissue).ravel(), in_tissue.ravel()

    def one(c):
        # the plane read from a lazy stack is released as soon as its spike-free copy exists
        prepared = prepare_channel(channel_plane(stack, c), per_channel[c], names[c],
                                   dtype=getattr(stack, "dtype", None), memo=memos[c])
        memos[c] = None
        clean = prepared["clean"]
        cq, summary = measure_prepared(prepared, per_channel[c], dtype_max, names[c],
                                       mask=inside)
        design[c + k] = summary.bins.ravel()
        quiet = stripe_counts(clean, keeps) if keeps is not None else None
        return cq, quiet

    measured = _map_threads(one, range(shape[0]), channel_threads(shape[1:], threads))
    results = [m[0] for m in measured]

    # The ghost fits are many small products: one BLAS thread is fastest, and
    # keeps a threaded BLAS from fighting other work for the cores.
    with one_thread("blas"):
        model = GhostModel(design=design, gram=gram_matrix(design), n_background=k,
                           shape=areas.shape, names=names, matrix=matrix,
                           wide=WideDesign.of(design) if matrix is None else None)
        results = _judge_with_ghosts(results, model, per_channel, threads=threads)
    if reference is not None:
        results = [_inherit_empty(cq, ref) for cq, ref in zip(results, reference.channels,
                                                               strict=True)]
        rows, columns = reference.striped_rows, reference.striped_columns
    else:
        rows = striped_lines(np.stack([m[1][0] for m in measured]), settings)
        columns = striped_lines(np.stack([m[1][1] for m in measured]), settings)
    flags = ("striped",) if rows or columns else ()
    return StackQuality(channels=tuple(results), flags=flags, striped_rows=rows,
                        striped_columns=columns, shape=shape, tissue=tissue)


def _tissue(total, shape, settings: QualitySettings, tissue, reference):
    """The tissue mask to measure with (see :func:`measure_stack`), or None."""
    if not settings.in_tissue:
        return None
    if tissue is None and reference is not None:
        tissue = reference.tissue
    if tissue is None and total is None:  # a reference measured without a mask
        return None
    if tissue is None:
        return roi_tissue(total, shape[0])
    tissue = np.asarray(tissue, bool)
    if tissue.shape != shape[1:]:
        raise InputError("tissue", f"mask is {tissue.shape}, the stack's planes are {shape[1:]}")
    return tissue


def _inherit_empty(cq: ChannelQuality, reference: ChannelQuality) -> ChannelQuality:
    """``cq`` flagged empty when its reference (the channel before cleaning) is."""
    if not reference.empty or cq.empty:
        return cq
    flags = tuple(f for f in CHANNEL_FLAGS if f == "empty" or f in cq.flags)
    return dataclasses.replace(cq, flags=flags)


def _judge_with_ghosts(results: list[ChannelQuality], model: GhostModel,
                       per_channel: list[QualitySettings], *, threads: int = 1
                       ) -> list[ChannelQuality]:
    """Redo the excess test of every channel with region backgrounds and ghosts in the model.

    (:func:`.ghosts.ghost_test`.)
    """
    split = model.n_background > 1
    if len(results) < 2 and not split:
        return results
    # the pairs a ghost may come from, once per distinct setting (a known matrix needs none)
    sources = {}
    if model.matrix is None:
        for s in per_channel:
            if s.plausible_ghosts not in sources:
                sources[s.plausible_ghosts] = model.sources(s)

    def judge(c):
        cq, s = results[c], per_channel[c]
        # ghosts and regions only explain more of a channel: one already empty stays empty
        if cq.empty or (not s.ghosts and model.matrix is None and not split):
            return cq
        return ghost_test(c, cq, model, s, sources.get(s.plausible_ghosts))

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
