"""Washing an ROI to a file in passes over staging stacks (files for a lazy ROI).

A stack larger than memory cannot be washed as one array, and a generic chunked graph
(each step a ``map_overlap``) keeps the halos of neighbouring chunks of every step
alive at once: with 50 channels one row of (C, tile, tile) chunks alone is a few
hundred MB. The steps here do not need that: hot pixels and speckle look at one channel
at a time, and compensation looks at one pixel (all channels) at a time. So the wash
runs in passes, each a set of independent dask tasks, over two staging files of float32
pixels in (C, Y, X) order beside the output. The passes are generated from the step
registry (:mod:`plexwash.qc.steps.registry`), one per step that runs, in its order:

* a copy first, only when the source's chunks hold several channels: the source is
  copied into file A as float32, chunk by chunk (a source chunked by channel is read
  plane by plane by the first pass directly, so its tiles are decoded once);
* a ``"plane"`` step (hot pixels, speckle): one task per channel; the whole plane is
  read, cleaned (speckle estimates its background from the whole plane) and written to
  A (the first pass also copies pass-through channels there);
* a ``"pixels"`` step (compensation): one task per band of rows (all used channels x a
  few rows x the full width), read from one file and written to the other.

The background context that speckle uses (:func:`plexwash.qc.background_context.roi_background`,
from the raw used planes) is not a pass of its own when the first step is a plane step
that does not use it (hot pixels): that pass reduces each raw plane it reads to its block
sums, and the context is fitted from them (for an ROI in memory on a thread of its own,
while the next passes, compensation, run; on disk, where memory counts, before them).

The last file written then holds the washed stack and is written to the output
(OME-TIFF tiles or OME-Zarr chunks) band by band. Every pass works on whole planes or on whole pixels, as the
in-memory wash does, so the pixels are bit for bit those of :func:`plexwash.qc.wash` on
the same stack, whatever the chunking. The removed-signal sums of each step come from
the same passes.

Memory is a few planes of one channel per thread (16 MB for 2000 x 2000 float32),
whatever the number of channels; disk is two float32 copies of the stack, in a hidden
``.NAME.spill-*`` folder beside the output that is removed when the wash ends (a run
sweeps leftovers of a killed one), or in another folder given as ``staging_dir`` (the
CLI passes ``$PLEXWASH_STAGING_DIR``).

An ROI held in memory (numpy) goes through the same passes with two numpy arrays as
staging (:class:`MemoryStack`): no removed map is kept, only its sums, which is faster
than :func:`plexwash.qc.wash` when only the washed stack and its numbers are wanted. A
small one (``DIRECT_BYTES``) runs those tasks without a dask graph.
"""

from __future__ import annotations

import functools
import os
import shutil
import tempfile
import threading
from concurrent.futures import Executor, ThreadPoolExecutor
from pathlib import Path

import numpy as np

from ._arrays import channel_plane, is_dask, used_channels
from .background_context import CONTEXT_BLOCK, block_sums, context_of_block_sums, roi_background
from .io.staged import StagedStack
from .steps.lifting import fractions_from_sums
from .steps.registry import STEPS, context_wanted
from .steps.stats import step_rows

#: Bytes of one compensation band (all used channels x rows x full width, float32).
BAND_BYTES = 8 * 2**20
#: Bytes the planes in flight in one pass may take: a pass runs at most
#: ``STAGE_WORKING_BYTES // (copies x plane bytes)`` channels at once (and never more
#: than dask's threads), so a 2000 x 2000 ROI's speckle pass runs one channel at a time.
STAGE_WORKING_BYTES = 96 * 2**20
#: An ROI in memory of at most this many float32 bytes is washed without a dask graph: the
#: same tasks run in turn, or on the run's thread pool (:func:`_on_threads`); for a small ROI
#: building and scheduling the graph costs more than its planes. Same tasks, same pixels.
DIRECT_BYTES = 4 * 2**20

_ITEM = np.dtype(np.float32).itemsize


class MemoryStack:
    """The in-memory counterpart of :class:`StagedStack` (a numpy array), for ROIs held in memory."""

    dtype = np.dtype(np.float32)
    ndim = 3

    def __init__(self, shape):
        self.array = np.empty(tuple(int(n) for n in shape), np.float32)
        self.shape = self.array.shape

    def read_rows(self, channels, y0: int, y1: int) -> np.ndarray:
        return self.array[list(channels), y0:y1]

    def write_rows(self, channels, y0: int, rows: np.ndarray) -> None:
        self.array[list(channels), y0:y0 + rows.shape[1]] = rows

    def read_plane(self, c: int) -> np.ndarray:
        return self.array[c].copy()  # tasks may write the plane back while it is read

    def write_plane(self, c: int, plane: np.ndarray) -> None:
        self.array[c] = plane

    def __setitem__(self, key, value) -> None:
        self.array[key] = value

    def close(self) -> None:
        pass


class Staging:
    """A hidden ``.NAME.spill-*`` folder for staging files; removed on exit.

    It is made beside ``out_path`` (where a rerun sweeps what a killed run left), or in
    ``staging_dir`` when given (e.g. a node's local scratch disk when the outputs go to
    network storage).
    """

    def __init__(self, out_path: Path | None, *, staging_dir: str | Path | None = None):
        """``out_path=None``: the stacks are numpy arrays (an ROI held in memory), no folder."""
        self.folder = None
        if out_path is not None:
            parent = Path(staging_dir or out_path.parent)
            parent.mkdir(parents=True, exist_ok=True)
            self.folder = Path(tempfile.mkdtemp(prefix=f".{out_path.name}.spill-", dir=parent))
        self._stacks: list = []

    def stack(self, name: str, shape) -> StagedStack | MemoryStack:
        if self.folder is None:
            return MemoryStack(shape)
        staged = StagedStack(self.folder / f"{name}.f32", shape)
        self._stacks.append(staged)
        return staged

    def __enter__(self):
        return self

    def __exit__(self, exc_type, *exc):
        # After an error or an interrupt, tasks of the pass may still be running: their
        # files are unlinked now but closed only when the tasks let go of them, so that no
        # descriptor number is reused (by the ledger, say) while a task still writes.
        if exc_type is None:
            for staged in self._stacks:
                staged.close()
        self._stacks.clear()
        if self.folder is not None:
            shutil.rmtree(self.folder, ignore_errors=True)


# ----------------------------------------------------------------------------- the passes


def band_rows(n_channels: int, width: int, height: int) -> int:
    """Rows per compensation band: about ``BAND_BYTES`` of float32 for the used channels."""
    rows = BAND_BYTES // max(1, n_channels * width * _ITEM)
    return int(min(max(rows, 1), height))


def wash_staged(roi, recipe, matrix, *, staging: Staging, notes: list) -> tuple[StagedStack | MemoryStack, dict]:
    """Wash an ROI (lazy, or numpy with in-memory staging) into a staged stack; return it
    and the per-step stats rows.

    The passes follow the step registry: a ``"plane"`` step is one task per used channel
    (a whole plane), a ``"pixels"`` step one task per band of rows of all used channels.
    The first pass also copies the source into staging as float32. ``matrix`` is the
    spillover matrix aligned to the used channels (None: no compensation). The stats rows
    are those of the in-memory wash (:func:`plexwash.qc.steps.stats.step_rows`), with
    sums accumulated over planes and bands.
    """
    import dask

    n_c, n_y, n_x = (int(n) for n in roi.data.shape)
    used = used_channels(roi.use)
    names = [roi.channels[i] for i in used]
    plan = [(step, recipe.for_channels(step.name, names)) for step in STEPS]
    running = [(step, settings) for step, settings in plan if step.runs(settings, matrix)]
    notes.extend(step.skipped_note for step, settings in plan
                 if step.skipped_note and not step.runs(settings, matrix))

    if staging.folder is not None:  # on disk, where memory is what counts
        _planes_off_heap()
    stacks = {"a": staging.stack("a", (n_c, n_y, n_x))}
    lazy = is_dask(roi.data)  # else any array: numpy, zarr
    direct = not lazy and staging.folder is None and n_c * n_y * n_x * _ITEM <= DIRECT_BYTES
    each = _on_threads if direct else _in_chains
    by_channel = not lazy or len(roi.data.chunks[0]) == n_c  # one channel per source chunk
    current = None  # None: the source itself, read plane by plane
    if not by_channel:
        import dask.array as da

        dask.compute(da.store(roi.data.astype(np.float32), stacks["a"], lock=False, compute=False))
        current = "a"

    def read_plane(where, c):
        if where is None:
            return channel_plane(roi.data, c, dtype=np.float32, scheduler="synchronous")
        return stacks[where].read_plane(c)

    def target(name):
        if name not in stacks:
            stacks[name] = staging.stack(name, (n_c, n_y, n_x))
        return stacks[name]

    plane_bytes = n_y * n_x * _ITEM
    # The ROI's background context, from the raw used planes (as the in-memory wash). When
    # the first step is a plane step that does not use it, that pass reduces each raw plane
    # to its block sums on the way and the model is fitted from them (for a wash in memory
    # on a thread of its own, while the next passes run); else it is made here, in a pass
    # of its own.
    later = _ContextLater.wanted(used, running, (n_y, n_x), aside=staging.folder is None, folder=staging.folder)
    context = None
    if used and context_wanted(running) and later is None:
        context = roi_background(lambda c: read_plane(current, c), used, (n_y, n_x))
    stats = {}
    copied = current  # the stack holding the pass-through channels
    compensated = None  # the stack that entered the last pixels step (compensation), while it is kept
    for k, (step, settings) in enumerate(running):
        settings_of = dict(zip(used, settings, strict=True))
        source = current
        if step.uses_background and later is not None:
            context = later.result()
        if step.scope == "plane":
            # written to A (in place when reading A): a plane is read whole before it is written
            dest = "a"
            channels = used if copied is not None else range(n_c)

            def plane_task(c, step=step, source=source, dest=dest, settings_of=settings_of, compensated=compensated,
                           context=context, collect=later if k == 0 else None):
                plane = read_plane(source, c)
                if c not in settings_of:  # a pass-through channel, copied once
                    target(dest).write_plane(c, plane)
                    return None
                if collect is not None:  # the raw plane, reduced for the background context
                    collect.add(c, plane)
                extra = {}
                if step.uses_background:  # what compensation removed: its input (still in A) minus its output
                    spilled = None
                    if compensated is not None:  # in place: one plane fewer in flight
                        spilled = read_plane(compensated, c)
                        np.subtract(spilled, plane, out=spilled)
                        spilled = spilled[None]
                    extra = {"background": context, "spilled": spilled}
                with fractions_from_sums():  # the rows take it from the sums below
                    cleaned, _, step_stats = step.run(plane[None], [settings_of[c]], None, parallel=False, **extra)
                target(dest).write_plane(c, cleaned[0])
                return step_stats[0], _sums(plane[None], cleaned)

            results = each(plane_task, channels, _chains(step.plane_copies * plane_bytes))
            if k == 0 and later is not None:
                later.start()
            done = dict(zip(channels, results, strict=True))
            stats[step.name] = step_rows([done[c][0] for c in used], *_stacked([done[c][1] for c in used]),
                                         worked=used, channels=range(n_c), all_names=roi.channels)
            if copied is None:
                copied = dest
            compensated = None  # A has been written over
        else:
            if source is None:  # bands need the source staged first
                each(lambda c: stacks["a"].write_plane(c, read_plane(None, c)), range(n_c),
                     _chains(2.0 * plane_bytes))
                source = copied = "a"
            dest = "b" if source == "a" else "a"
            rows = band_rows(len(used), n_x, n_y)
            band_settings = [settings_of[c] for c in used]

            def band_task(y0, step=step, source=source, dest=dest, band_settings=band_settings, rows=rows):
                y1 = min(y0 + rows, n_y)
                band = stacks[source].read_rows(used, y0, y1)
                out, _, step_stats = step.run(band, band_settings, matrix, parallel=False)
                target(dest).write_rows(used, y0, out)
                return _sums(band, out), step_stats

            target(dest)  # made before the tasks run
            if direct:
                sums = each(band_task, range(0, n_y, rows), 1)
            else:
                sums = dask.compute(*[dask.delayed(band_task, pure=False)(y) for y in range(0, n_y, rows)])
            removed_sum = np.sum([s[0][0] for s in sums], axis=0)
            input_sum = np.sum([s[0][1] for s in sums], axis=0)
            # a pixels step's own numbers are per channel and the same in every band
            stats[step.name] = step_rows(sums[0][1], removed_sum, input_sum,
                                         worked=used, channels=range(n_c), all_names=roi.channels)
            compensated = source
        current = dest
    if current is None:  # no step runs: the source, as float32
        each(lambda c: stacks["a"].write_plane(c, read_plane(None, c)), range(n_c), _chains(2.0 * plane_bytes))
        current = copied = "a"
    passing = [c for c in range(n_c) if c not in set(used)]
    if passing and copied != current:
        each(lambda c: stacks[current].write_plane(c, stacks[copied].read_plane(c)), passing,
             _chains(2.0 * plane_bytes))
    return stacks[current], stats


class _ContextLater:
    """The ROI's background context, fitted on a thread of its own from the block sums that
    the first pass (a plane step that does not use it) gathers from the raw used planes.

    The same sums as :func:`plexwash.qc.background_context.roi_background` takes, so the same
    context. With ``aside``, fitting it (one thread, at block resolution) overlaps the
    passes before the first step that uses it; after an error the fit still ends on its
    own and its result is dropped with the object. Without (a wash staged on disk, where
    memory is what counts: the fit's arrays then never meet a pass's), it is fitted as
    soon as the first pass ends.

    With a staging ``folder`` (on disk), the block sums (float64), the model's rates
    (float32) and the context's pixel-size maps are memory maps of files there rather
    than arrays on the heap: the same values, in pages that the system may write out (for
    36 x 2400 x 2400, 99 MiB of sums through the first pass, 49 MiB of rates and 33 MiB of
    maps held through every later one).
    """

    def __init__(self, used, shape, aside: bool, folder: Path | None = None):
        ny, nx = shape
        self._aside = aside
        self._position = {c: k for k, c in enumerate(used)}
        self._shape = (ny, nx)
        blocks = (len(used), -(-ny // CONTEXT_BLOCK), -(-nx // CONTEXT_BLOCK))
        self._blocks = _scratch(folder, "context-blocks", blocks, np.float64)
        self._rates = None if folder is None else _scratch(folder, "context-rates", blocks, np.float32)
        self._folder = folder
        self._future = None

    @classmethod
    def wanted(cls, used, running, shape, *, aside: bool, folder: Path | None = None) -> _ContextLater | None:
        """One when a step wants the context and the first step can gather its sums, else None."""
        if not used or not context_wanted(running):
            return None
        first = running[0][0]
        if first.scope != "plane" or first.uses_background:
            return None
        return cls(used, shape, aside, folder)

    def add(self, c: int, plane: np.ndarray) -> None:
        """Block sums of used channel ``c``'s raw plane (each channel once, from any thread)."""
        self._blocks[self._position[c]] = block_sums(plane, CONTEXT_BLOCK)

    def start(self) -> None:
        """Every used plane is in: fit the context on a thread of its own, or here when not
        ``aside`` or when the wash has one thread only (a worker of ``--workers`` with one
        core: no thread more)."""
        from concurrent.futures import Future, ThreadPoolExecutor

        if self._aside and _wash_threads() > 1:
            pool = ThreadPoolExecutor(1, thread_name_prefix="plexwash-context")
            self._future = pool.submit(context_of_block_sums, self._blocks, self._shape)
            pool.shutdown(wait=False)
        else:
            self._future = Future()
            empty = None if self._folder is None else functools.partial(_scratch, self._folder)
            self._future.set_result(context_of_block_sums(self._blocks, self._shape, rates_out=self._rates,
                                                          empty=empty))
        self._blocks = self._rates = None

    def result(self):
        """The context (waits for the fit)."""
        return self._future.result()


def _scratch(folder: Path | None, name: str, shape, dtype) -> np.ndarray:
    """An empty array: a memory map of a new file ``name`` in ``folder``, or on the heap when None."""
    if folder is None:
        return np.empty(shape, dtype)
    return np.memmap(folder / f"{name}.bin", dtype=dtype, mode="w+", shape=tuple(shape))


def _wash_threads() -> int:
    """Threads the wash may keep busy: dask's ``num_workers`` when set (a run's worker
    sets it to its share of the cores), else the cores."""
    import dask

    return int(dask.config.get("num_workers", None) or os.cpu_count() or 1)


def _planes_off_heap() -> None:
    """Give arrays of 1 MiB and more their own memory maps, returned to the system when freed
    (glibc ``mallopt(M_MMAP_THRESHOLD, 1 MiB)``; a no-op where glibc is absent).

    glibc raises its threshold for that, by default, up to 32 MiB as soon as a mapped block
    is freed; from then on every freed plane and band (a few MiB to a few tens of MiB)
    stays in the heap, and the pieces of the heap that other arrays pin keep it resident:
    the process held two to three times what its passes have in flight. A fixed threshold
    keeps the passes' memory at what they hold. Set once per process; the pixels do not
    depend on it.
    """
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").mallopt(_M_MMAP_THRESHOLD, 2**20)
    except (OSError, AttributeError):
        pass


_M_MMAP_THRESHOLD = -3  # from glibc's malloc.h


def _chains(task_bytes: float) -> int:
    """How many tasks of ``task_bytes`` may run at once within ``STAGE_WORKING_BYTES``."""
    return int(max(1, STAGE_WORKING_BYTES // max(task_bytes, 1)))


def _in_chains(function, items, chains: int) -> list:
    """``[function(i) for i in items]`` as ``chains`` dask tasks, each doing its items in turn.

    dask runs at most as many tasks at once as it has threads; chains bound it further,
    so memory stays at ``chains`` tasks' worth whatever the thread count.
    """
    import dask

    items = list(items)
    chains = max(1, min(chains, len(items)))
    groups = [items[k::chains] for k in range(chains)]

    def run(group):
        return [function(i) for i in group]

    done = dask.compute(*[dask.delayed(run, pure=False)(g) for g in groups])
    results = {}
    for group, values in zip(groups, done, strict=True):
        results.update(zip(group, values, strict=True))
    return [results[i] for i in items]


def _on_threads(function, items, chains: int) -> list:
    """``[function(i) for i in items]`` without a task graph (a small ROI): on the threads of
    the run's pool (dask's ``pool``, else one of this module) when the wash may use more
    than one thread, else in turn on the calling thread. Each item is the same task as in
    :func:`_in_chains`, so the results are the same."""
    threads = _wash_threads()
    items = list(items)
    if threads <= 1 or len(items) <= 1:
        return [function(i) for i in items]
    return list(_pool(threads).map(function, items))


def _pool(threads: int):
    """The run's thread pool (dask's ``pool`` setting, as :func:`plexwash.qc.run` sets it), else
    a pool of ``threads`` threads kept by this module for the next small ROIs."""
    import dask

    pool = dask.config.get("pool", None)
    if isinstance(pool, Executor):
        return pool
    with _pools_lock:
        if threads not in _pools:
            _pools[threads] = ThreadPoolExecutor(threads, thread_name_prefix="plexwash-small")
        return _pools[threads]


_pools: dict[int, ThreadPoolExecutor] = {}
_pools_lock = threading.Lock()


def _sums(before: np.ndarray, after: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel removed (``before - after``) and input sums (float64) of a (C, y, x) piece."""
    from ._staging_kernels import removed_and_input_sums

    return removed_and_input_sums(np.ascontiguousarray(before, np.float32),
                                  np.ascontiguousarray(after, np.float32))


def _stacked(pairs) -> tuple[np.ndarray, np.ndarray]:
    return np.concatenate([p[0] for p in pairs]), np.concatenate([p[1] for p in pairs])
