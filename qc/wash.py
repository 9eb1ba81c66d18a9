"""The wash: one ROI through the cleaning steps, in order, as one computation.

The steps and their order come from the registry (:mod:`plexwash.qc.steps.registry`):
``hot_pixels`` -> ``compensation`` -> ``speckle``. Each step is a pure function of the
previous step's output; the wash records what each step removed (a removed map per
channel) and the fraction of each channel's signal that went, so over-cleaning is
visible. Channels that the stain sheet marks ``wash = no`` pass through untouched and
take no part in compensation.

A wash of some channels (``channels=[...]``, the studio's preview) is the same
computation restricted to what those channels need: the steps up to the last one that
works on all used channels at once (compensation, when it runs) run on every used
channel, the later ones only on the requested channels. Plane steps treat channels
independently, so the requested channels are bit for bit those of the full wash.

A numpy ROI is washed in memory; for a dask ROI :func:`wash` returns a lazy graph
(chunks of all channels x tile x tile) for notebooks and previews. Writing a wash
(:func:`wash_to_file`, every run) goes through the passes of :mod:`plexwash.qc.staging`
instead, which keep memory at a few single-channel planes and give the same pixels.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping
from datetime import UTC
from pathlib import Path

import numpy as np

from ._arrays import channel_plane, is_dask, stack_planes, used_channels
from .background_context import roi_background
from .errors import InputError
from .io import Roi, write_stack
from .io.tiff import source_ome_xml
from .recipe import Recipe, default_recipe
from .staging import MemoryStack, Staging, wash_staged
from .steps.compensation import compensation_matrix
from .steps.registry import STEPS, Step, context_wanted
from .steps.stats import finish_stats, step_rows


@dataclasses.dataclass(frozen=True)
class Washed:
    """The result of washing one ROI.

    Attributes
    ----------
    data : numpy.ndarray or dask.array.Array
        Washed stack (C, Y, X), float32.
    channels, labels : tuple of str
        As in the ROI (or the channels asked for, in that order).
    pixel_size : (float, float) or None
        As in the ROI.
    removed : mapping
        Step name -> removed map (C, Y, X): what the step took away (input - output);
        zeros for channels the step did not touch.
        Steps that did not run are absent.
    stats : mapping
        Step name -> one dict per channel with at least ``removed_fraction`` (the
        fraction of that channel's signal the step removed) and the step's own numbers.
    notes : tuple of str
        Human-readable remarks (e.g. compensation skipped because no matrix was given).
    """

    data: object
    channels: tuple[str, ...]
    labels: tuple[str, ...]
    pixel_size: tuple[float, float] | None
    removed: Mapping[str, object]
    stats: Mapping[str, list]
    notes: tuple[str, ...] = ()
    roi: str = ""

    @property
    def is_lazy(self) -> bool:
        return is_dask(self.data)


@dataclasses.dataclass(frozen=True)
class WashedFile:
    """What :func:`wash_to_file` wrote.

    Attributes
    ----------
    output : Path
        The washed stack (OME-TIFF or OME-Zarr), written atomically.
    seconds : float
        Wall time of the wash and the write.
    stats : mapping
        Step name -> one dict per channel with at least ``removed_fraction``, as in
        :attr:`Washed.stats`.
    notes : tuple of str
        Human-readable remarks, as in :attr:`Washed.notes`.
    measured : object
        What ``measure`` returned (None without it).
    """

    output: Path
    seconds: float
    stats: Mapping[str, list]
    notes: tuple[str, ...] = ()
    measured: object = None


def wash(roi: Roi, recipe: Recipe | None = None, *, spillover=None, channels=None,
         cache: WashCache | None = None) -> Washed:
    """Wash one ROI (or some of its channels) with a recipe.

    Parameters
    ----------
    roi : Roi
        From :func:`plexwash.qc.read_roi`.
    recipe : Recipe, optional
        Settings of every step (defaults when omitted).
    spillover : SpilloverMatrix, str or Path, optional
        The spillover matrix (or its CSV). Overrides the recipe's ``[compensation]
        spillover``. Without any matrix, compensation is skipped and a note says so.
    channels : sequence of str, optional
        Channel names (or labels): the result holds only these, in this order, bit for
        bit as in the full wash. Compensation still uses every used channel.
    cache : WashCache, optional
        Keeps the ROI's float32 planes and the result of the steps that need every used
        channel between calls, keyed on what they depend on (the studio's preview, one
        channel after another). The result is computed in memory (numpy).

    Returns
    -------
    Washed

    Examples
    --------
    >>> import numpy as np
    >>> from plexwash.qc.io import Roi
    >>> stack = np.zeros((2, 32, 32), np.float32); stack[0, 10, 10] = 500.0
    >>> washed = wash(Roi(stack, ("Nd145", "Nd146"), Path("demo.ome.tiff")))
    >>> float(washed.data[0, 10, 10]), washed.stats["hot_pixels"][0]["removed_fraction"]
    (0.0, 1.0)
    >>> wash(Roi(stack, ("Nd145", "Nd146"), Path("demo.ome.tiff")), channels=["Nd146"]).channels
    ('Nd146',)
    """
    recipe = recipe or default_recipe()
    recipe.check_channels(roi.channels, roi=roi.path)
    plan = _plan(roi, recipe, spillover, channels)
    if cache is not None:
        cache.start(roi)
        source = _Source.cached(cache, roi, plan)
    else:
        source = _Source.of(roi, recipe)
    stack, work, records = _run(plan, source, cache)
    return _assemble(roi, plan, source, stack, work, records)


@dataclasses.dataclass(frozen=True)
class _Plan:
    """What a wash will do, in ROI channel indices.

    ``wanted``: the channels of the result, in its order; ``used``: the channels that take
    part in the wash; ``own``: the used channels among the wanted (ROI order); ``steps``:
    per registry step its settings by channel and whether it runs; ``shared``: index of
    the last running step that needs every used channel (-1: none), up to which the wash
    works on all used channels.
    """

    wanted: list[int]
    used: list[int]
    own: list[int]
    steps: list[tuple[Step, dict, bool]]
    shared: int
    matrix: np.ndarray | None
    notes: tuple[str, ...]


def _plan(roi: Roi, recipe: Recipe, spillover, channels) -> _Plan:
    wanted = _wanted(roi, channels)
    used = used_channels(roi.use)
    names = [roi.channels[i] for i in used]
    matrix = compensation_matrix(names, recipe.compensation, spillover, recipe_matrix=recipe.spillover_path())
    steps, notes = [], []
    for step in STEPS:
        settings = recipe.for_channels(step.name, names)
        runs = step.runs(settings, matrix)
        steps.append((step, dict(zip(used, settings, strict=True)), runs))
        if not runs and step.skipped_note:
            notes.append(step.skipped_note)
    shared = max((k for k, (step, _, runs) in enumerate(steps) if runs and step.scope == "pixels"), default=-1)
    own = [i for i in used if i in set(wanted)]
    return _Plan(wanted, used, own, steps, shared, matrix, tuple(notes))


@dataclasses.dataclass(frozen=True)
class _Source:
    """The ROI's pixels as float32: ``stack(indices)`` (C', Y, X) and ``plane(i)``."""

    stack: Callable
    plane: Callable

    @classmethod
    def of(cls, roi: Roi, recipe: Recipe) -> _Source:
        if is_dask(roi.data):
            data = _as_float32(roi.data, tile=recipe.output.tile)
            return cls(lambda indices: _select(data, indices), data.__getitem__)
        # in memory: only the planes a wash of some channels needs are converted
        data = roi.data if isinstance(roi.data, np.ndarray) else np.asarray(roi.data)
        return cls(lambda indices: np.asarray(_select(data, indices), dtype=np.float32),
                   lambda i: np.asarray(data[i], dtype=np.float32))

    @classmethod
    def cached(cls, cache: WashCache, roi: Roi, plan: _Plan) -> _Source:
        planes = cache.planes(roi, sorted(set(plan.wanted) | set(plan.used if plan.shared >= 0 else ())))
        return cls(lambda indices: stack_planes([planes[i] for i in indices]), planes.__getitem__)


@dataclasses.dataclass(frozen=True)
class _StepRecord:
    """What one step of a wash did, over the ROI channels ``work`` (in that order)."""

    step: Step
    work: tuple[int, ...]
    removed: object
    before_sum: object
    stats: list


def _run(plan: _Plan, source: _Source, cache: WashCache | None):
    """Run the planned steps; returns the last stack, the channels it holds and the records.

    Steps up to ``plan.shared`` work on every used channel, later ones on ``plan.own``.
    With a cache, a step whose inputs are unchanged (same channels, matrix and settings
    of it and of every step before) is taken from it.
    """
    work = plan.used if plan.shared >= 0 else plan.own
    key: tuple = (tuple(work), _matrix_key(plan.matrix))
    stack, records = None, []
    context = _background(plan, source, cache)
    for k, (step, settings, runs) in enumerate(plan.steps):
        if runs and work:
            key += ((step.name, tuple(settings[i] for i in work)),)
            kept = cache.result(k, key) if cache is not None else None
            if kept is None:
                before = source.stack(work) if stack is None else stack
                extra = {"background": context, "spilled": _spilled(records, work)} if step.uses_background else {}
                stack, _, step_stats = step.run(before, [settings[i] for i in work], plan.matrix, **extra)
                record = _StepRecord(step, tuple(work), before - stack,
                                     before.sum(axis=(1, 2), dtype=np.float64), step_stats)
                records = records + [record]
                if cache is not None:
                    cache.keep(k, key, (stack, records))
            else:
                stack, records = kept
        elif runs:  # the step runs, but on none of the channels asked for (pass-through ones)
            records = records + [_StepRecord(step, (), None, (), [])]
        if k == plan.shared and plan.own != work:  # later steps: only the channels asked for
            stack = _select(stack, [work.index(i) for i in plan.own]) if plan.own else None
            work = plan.own
            key += (("channels", tuple(work)),)
    if stack is None and work:
        stack = source.stack(work)
    return stack, work, records


def _spilled(records, work):
    """What the last step before took away from the channels ``work`` when that step was
    compensation (a "pixels" step), else None."""
    if not records or records[-1].step.scope != "pixels" or records[-1].removed is None:
        return None
    last = records[-1]
    return _select(last.removed, [list(last.work).index(i) for i in work])


def _background(plan: _Plan, source: _Source, cache: WashCache | None):
    """The ROI's background context (from the raw used channels, whatever channels are asked
    for, so a wash of some channels tests against the same model), or None when no running
    step uses it."""
    running = [(step, [settings[i] for i in plan.used]) for step, settings, runs in plan.steps if runs]
    if not plan.used or not context_wanted(running):
        return None
    if cache is not None:
        return cache.background(plan.used)
    shape = source.plane(plan.used[0]).shape
    return roi_background(lambda i: np.asarray(source.plane(i)), plan.used, shape)


def _assemble(roi: Roi, plan: _Plan, source: _Source, stack, work, records) -> Washed:
    """The :class:`Washed` of the wanted channels: washed planes, removed maps, stats rows."""
    wanted = plan.wanted
    zeros = _zeros_like_plane(source.plane(wanted[0]))
    removed, stats = {}, {}
    for record in records:
        removed[record.step.name] = _gather(record.removed, record.work, wanted, lambda i: zeros)
        removed_sum = record.removed.sum(axis=(1, 2), dtype=np.float64) if record.work else ()
        stats[record.step.name] = step_rows(record.stats, removed_sum, record.before_sum, worked=record.work,
                                            channels=wanted, all_names=roi.channels)
    washed = _gather(stack, work, wanted, source.plane)
    return Washed(washed, tuple(roi.channels[i] for i in wanted), tuple(roi.labels[i] for i in wanted),
                  roi.pixel_size, removed, stats, plan.notes, roi.name)


def _wanted(roi: Roi, channels) -> list[int]:
    """ROI indices of the channels asked for (all, in ROI order, when None)."""
    if channels is None:
        return list(range(len(roi.channels)))
    if isinstance(channels, str):
        raise InputError("channels", "expected a list of channel names, got one string")
    wanted = [roi.channel_index(c) for c in channels]
    if len(set(wanted)) != len(wanted):
        raise InputError("channels", "a channel is asked for twice")
    if not wanted:
        raise InputError("channels", "no channel asked for")
    return wanted


def _matrix_key(matrix):
    return None if matrix is None else (matrix.shape, np.ascontiguousarray(matrix, np.float64).tobytes())


def _select(stack, positions):
    """``stack[positions]`` (no copy when that is every channel in order)."""
    positions = list(positions)
    if positions == list(range(stack.shape[0])):
        return stack
    return stack[positions]


def _zeros_like_plane(plane):
    if is_dask(plane):
        import dask.array as da

        return da.zeros_like(plane)
    return np.zeros(plane.shape, np.float32)


def _gather(stack, work, wanted, fallback):
    """(len(wanted), Y, X): ``stack``'s planes (over ``work``) for wanted channels, ``fallback(i)`` otherwise."""
    work = list(work)
    if work == list(wanted):
        return stack
    position = {i: k for k, i in enumerate(work)}
    return stack_planes([stack[position[i]] if i in position else fallback(i) for i in wanted])


class WashCache:
    """What a wash of some channels may reuse for the next call (the studio's preview).

    Holds the ROI's float32 planes (read once) and, for each step, the stack after it
    with the records of the steps so far, keyed on everything they depend on: the
    channels worked on, the spillover matrix and the settings of that step and of every
    step before it. Changing a later step's settings (speckle) reuses the earlier ones
    (hot pixels, compensation of every used channel); changing anything they depend on
    recomputes them. ``reused`` names the steps the last wash took from the cache. Not
    thread-safe: one wash at a time.
    """

    def __init__(self):
        self._source = None
        self._planes: dict[int, np.ndarray] = {}
        self._results: dict[int, tuple] = {}
        self._background: dict[tuple, object] = {}
        self.reused: tuple[str, ...] = ()

    def _for(self, roi: Roi) -> None:
        self._roi = roi
        if self._source is not roi.data:
            self._source = roi.data
            self._planes = {}
            self._results = {}
            self._background = {}

    def planes(self, roi: Roi, indices) -> dict[int, np.ndarray]:
        """The ROI's planes ``indices`` as float32 numpy (read once): ROI index -> plane."""
        self._for(roi)
        for i in indices:
            if i not in self._planes:
                self._planes[i] = np.ascontiguousarray(channel_plane(roi.data, i, dtype=np.float32))
        return self._planes

    def background(self, used) -> object:
        """The background context of the current ROI over the ``used`` channels (made once)."""
        key = tuple(used)
        if key not in self._background:
            planes = self.planes(self._roi, key)
            shape = planes[key[0]].shape
            self._background[key] = roi_background(planes.__getitem__, key, shape)
        return self._background[key]

    def start(self, roi: Roi) -> None:
        """A wash of ``roi`` begins."""
        self._for(roi)
        self.reused = ()

    def result(self, k: int, key):
        """The kept result after step ``k`` when it was made under ``key``, else None."""
        kept = self._results.get(k)
        if kept is None or kept[0] != key:
            return None
        self.reused += (kept[1][1][-1].step.name,)
        return kept[1]

    def keep(self, k: int, key, value) -> None:
        self._results[k] = (key, value)


#: Bytes of one chunk of the lazy graph :func:`wash` returns for a dask ROI (all channels
#: x edge x edge float32). Writing a wash does not use that graph: see ``staging``.
CHUNK_BYTES = 64 * 2**20


def _as_float32(data, *, tile: int):
    if is_dask(data):
        n_c, n_y, n_x = data.shape
        budget = int((CHUNK_BYTES / (4 * n_c)) ** 0.5) // 64 * 64
        edge = max(64, min(tile, budget))
        return data.astype(np.float32).rechunk((n_c, min(edge, n_y), min(edge, n_x)))
    return np.asarray(data, dtype=np.float32)


def compute(washed: Washed) -> Washed:
    """Compute a lazy wash in memory (small stacks, notebooks); numpy washes return as is."""
    if not washed.is_lazy:
        return washed
    import dask

    removed_keys = list(washed.removed)
    data, removed, stats = dask.compute(washed.data, [washed.removed[k] for k in removed_keys],
                                        dict(washed.stats))
    for rows in stats.values():
        finish_stats(rows)
    return dataclasses.replace(washed, data=data, removed=dict(zip(removed_keys, removed, strict=True)),
                               stats=stats)


def wash_to_file(roi: Roi, out_path: str | Path, recipe: Recipe | None = None, *, spillover=None,
                 staging_dir: str | Path | None = None, provenance=None, measure=None) -> WashedFile:
    """Wash one ROI and write it atomically; the pixels and the stats come from the same passes.

    The wash runs in passes (:mod:`plexwash.qc.staging`): a lazy (dask) ROI over two
    staging files beside the output, so memory stays at a few single-channel planes per
    thread whatever the number of channels; a numpy ROI over two arrays in memory. No
    removed map is kept, only its sums. The pixels equal those of :func:`wash`.

    Parameters
    ----------
    roi : Roi
        The ROI to wash.
    out_path : str or Path
        The washed stack to write (``.ome.tiff`` or ``.ome.zarr``, as the recipe's output says).
    recipe : Recipe, optional
        Defaults apply when omitted.
    spillover : SpilloverMatrix, str or Path, optional
        Overrides the recipe's ``[compensation] spillover``.
    staging_dir : str or Path, optional
        Folder for the staging files of a lazy ROI instead of the output's folder (e.g.
        a node's local scratch disk when the output goes to network storage).
    provenance : mapping, optional
        Written into the output's metadata (hashes of the input, recipe, spillover).
        The tool, its version and the date are always added.
    measure : callable, optional
        Called once the output is written with the washed stack still at hand (a numpy
        array, or for a lazy ROI the staging file, read plane by plane: the pixels of the
        output, without reading and decoding it back); its result is ``measured``.

    Returns
    -------
    WashedFile
        The output path, the time taken, the per-step stats and the notes.
    """
    started = time.perf_counter()
    recipe = recipe or default_recipe()
    out_path = Path(out_path)
    if out_path.exists() and roi.path.exists() and out_path.resolve() == roi.path.resolve():
        raise InputError(out_path, "output path is the input; refusing to overwrite raw data")
    recipe.check_channels(roi.channels, roi=roi.path)
    names = [c for c, u in zip(roi.channels, roi.use, strict=True) if u]
    matrix = compensation_matrix(names, recipe.compensation, spillover, recipe_matrix=recipe.spillover_path())
    notes: list[str] = []
    # a numpy ROI is staged in memory; no removed maps are kept, only their sums
    with Staging(out_path if is_dask(roi.data) else None, staging_dir=staging_dir) as staging:
        staged, stats = wash_staged(roi, recipe, matrix, staging=staging, notes=notes)
        data = staged.array if isinstance(staged, MemoryStack) else staged
        write_stack(out_path, data, roi.channels, pixel_size=roi.pixel_size, settings=recipe.output,
                    labels=roi.labels, provenance=_provenance(provenance),
                    source_xml=source_ome_xml(roi.path))
        seconds = time.perf_counter() - started
        measured = measure(data) if measure is not None else None
    return WashedFile(output=out_path, seconds=seconds, stats=stats, notes=tuple(notes),
                      measured=measured)


def _provenance(extra) -> dict[str, str]:
    """Tool, version and date, then the caller's entries (hashes), as text."""
    from datetime import datetime

    from ._version import __version__

    record = {"software": "plexwash", "version": __version__,
              "date": datetime.now(UTC).isoformat(timespec="seconds")}
    record.update({str(k): str(v) for k, v in (extra or {}).items() if v is not None})
    return record
