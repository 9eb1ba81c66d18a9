"""The wash: one ROI through the cleaning steps, in order, as one computation.

Steps always run in this order: ``hot_pixels`` -> ``compensation`` -> ``speckle``.
Each step is a pure function of the previous step's output; the wash records what each
step removed (a removed map per channel) and the fraction of each channel's signal that
went, so over-cleaning is visible. Channels that the panel marks ``use = no`` pass
through untouched and take no part in compensation.

A numpy ROI is washed in memory; for a dask ROI :func:`wash` returns a lazy graph
(chunks of all channels x tile x tile) for notebooks and previews. Writing a wash
(:func:`wash_to_file`, every run) goes through the passes of :mod:`plexwash.qc.staging`
instead, which keep memory at a few single-channel planes and give the same pixels.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .errors import InputError
from .io import Roi, _is_dask, write_stack
from .recipe import Recipe, default_recipe

STEPS = ("hot_pixels", "compensation", "speckle")


@dataclasses.dataclass(frozen=True)
class Washed:
    """The result of washing one ROI.

    Attributes
    ----------
    data : numpy.ndarray or dask.array.Array
        Washed stack (C, Y, X), float32.
    channels, labels : tuple of str
        As in the ROI.
    pixel_size : (float, float) or None
        As in the ROI.
    removed : mapping
        Step name -> removed map (C, Y, X): what the step took away (input - output).
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
        return _is_dask(self.data)


def wash(roi: Roi, recipe: Recipe | None = None, *, spillover=None) -> Washed:
    """Wash one ROI with a recipe.

    Parameters
    ----------
    roi : Roi
        From :func:`plexwash.qc.read_roi`.
    recipe : Recipe, optional
        Settings of every step (defaults when omitted).
    spillover : SpilloverMatrix, str or Path, optional
        The spillover matrix (or its CSV). Overrides the recipe's ``[compensation]
        spillover``. Without any matrix, compensation is skipped and a note says so.

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
    """
    recipe = recipe or default_recipe()
    recipe.check_channels(roi.channels, roi=roi.path)
    data = _as_float32(roi.data, tile=recipe.output.tile)
    used = [i for i, u in enumerate(roi.use) if u]
    names = [roi.channels[i] for i in used]
    stack = data[used] if len(used) < len(roi.channels) else data
    removed, stats, notes = {}, {}, []

    for step in STEPS:
        before = stack
        if step == "compensation":
            result = _compensation_step(stack, names, recipe, spillover, roi)
            if result is None:
                notes.append("compensation skipped: no spillover matrix given")
                continue
            stack, step_stats = result
        else:
            settings = recipe.for_channels(step, names)
            if not any(s.enabled for s in settings):
                continue
            stack, _, step_stats = _STEP_FUNCTIONS[step]()(stack, settings)
        removed_map = before - stack
        removed[step] = _expand(removed_map, used, len(roi.channels), zeros=True)
        stats[step] = _with_fractions(step_stats, removed_map, before, names, used, roi.channels)

    washed = _expand(stack, used, len(roi.channels), original=data)
    return Washed(washed, tuple(roi.channels), tuple(roi.labels), roi.pixel_size,
                  removed, stats, tuple(notes), roi.name)


def _step_hot_pixels():
    from .speckle import hot_pixels_stack

    return hot_pixels_stack


def _step_speckle():
    from .speckle import speckle_stack

    return speckle_stack


_STEP_FUNCTIONS = {"hot_pixels": _step_hot_pixels, "speckle": _step_speckle}


def _compensation_step(stack, names, recipe: Recipe, spillover, roi: Roi):
    """Compensated stack and per-channel stats, or None when there is no matrix."""
    values = _compensation_values(names, recipe, spillover)
    if values is None:
        return None
    from .spillover import compensate

    method = recipe.compensation.method
    out = compensate(stack, values, method=method)
    return out, [{"method": method} for _ in names]


def _compensation_values(names, recipe: Recipe, spillover):
    """The spillover matrix over the used channels, or None when compensation does not run."""
    if not recipe.compensation.enabled:
        return None
    if spillover is None:
        spillover = recipe.spillover_path()
    if spillover is None:
        return None
    from .spillover import SpilloverMatrix, align_spillover, read_spillover

    source = spillover if isinstance(spillover, (str, Path)) else "spillover matrix"
    matrix = spillover if isinstance(spillover, SpilloverMatrix) else read_spillover(spillover)
    return align_spillover(matrix, names, source=source)


#: Bytes of one chunk of the lazy graph :func:`wash` returns for a dask ROI (all channels
#: x edge x edge float32). Writing a wash does not use that graph: see ``staging``.
CHUNK_BYTES = 64 * 2**20


def _as_float32(data, *, tile: int):
    if _is_dask(data):
        n_c, n_y, n_x = data.shape
        budget = int((CHUNK_BYTES / (4 * n_c)) ** 0.5) // 64 * 64
        edge = max(64, min(tile, budget))
        return data.astype(np.float32).rechunk((n_c, min(edge, n_y), min(edge, n_x)))
    return np.asarray(data, dtype=np.float32)


def _expand(sub, used: Sequence[int], n_channels: int, *, original=None, zeros: bool = False):
    """Put the used channels back among the pass-through ones (or zeros for removed maps)."""
    if len(used) == n_channels:
        return sub
    if _is_dask(sub):
        import dask.array as da

        fill = da.zeros_like(sub[0]) if zeros or original is None else None
        planes, k = [], 0
        for i in range(n_channels):
            if i in used:
                planes.append(sub[k])
                k += 1
            else:
                planes.append(fill if fill is not None else original[i])
        return da.stack(planes)
    out = np.zeros((n_channels,) + sub.shape[1:], np.float32)
    if not zeros and original is not None:
        out[...] = original
    out[list(used)] = sub
    return out


def _with_fractions(step_stats, removed_map, before, names, used, all_channels):
    """Per-channel stats of a step from its removed map and its input (numpy or dask)."""
    removed_sum = removed_map.sum(axis=(1, 2), dtype=np.float64)
    input_sum = before.sum(axis=(1, 2), dtype=np.float64)
    return _step_rows(step_stats, removed_sum, input_sum, names, used, all_channels)


def _step_rows(step_stats, removed_sum, input_sum, names, used, all_channels):
    """Per-channel stats (one dict per channel of the ROI) with the removed fraction.

    The fraction is the channel's removed signal over its signal entering the step
    (sums over the used channels, in their order), so the numbers do not depend on
    chunking or on the step's own bookkeeping. Dask sums stay lazy until computed.
    """
    rows = []
    k = 0
    for i, name in enumerate(all_channels):
        if i not in used:
            rows.append({"channel": name, "ran": False, "removed_fraction": 0.0})
            continue
        row = {"channel": name, "ran": True}
        row.update(_plain(step_stats[k]) if step_stats is not None else {})
        row["removed_sum"] = removed_sum[k]
        row["input_sum"] = input_sum[k]
        rows.append(row)
        k += 1
    if not _is_dask(removed_sum):
        finish_stats(rows)
    return rows


def _plain(stats) -> dict:
    return dict(stats) if isinstance(stats, Mapping) else dict(vars(stats))


def finish_stats(rows: list[dict]) -> list[dict]:
    """Turn computed sums into ``removed_fraction`` (in place) and plain Python numbers."""
    for row in rows:
        if "removed_sum" in row:
            removed, total = float(row.pop("removed_sum")), float(row.pop("input_sum"))
            row["removed_fraction"] = removed / total if total > 0 else 0.0
        for key, value in list(row.items()):
            if isinstance(value, np.generic):
                row[key] = value.item()
    return rows


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


def wash_to_file(roi: Roi, out_path: str | Path, recipe: Recipe | None = None, *, spillover=None) -> dict:
    """Wash one ROI and write it atomically; the pixels and the stats come from the same passes.

    The wash runs in passes (:mod:`plexwash.qc.staging`): a lazy (dask) ROI over two
    staging files beside the output, so memory stays at a few single-channel planes per
    thread whatever the number of channels; a numpy ROI over two arrays in memory. No
    removed map is kept, only its sums. The pixels equal those of :func:`wash`.

    Returns
    -------
    dict
        ``output`` (path), ``seconds``, ``stats`` (step -> per-channel dicts with
        ``removed_fraction``) and ``notes``.
    """
    started = time.perf_counter()
    recipe = recipe or default_recipe()
    out_path = Path(out_path)
    if out_path.exists() and roi.path.exists() and out_path.resolve() == roi.path.resolve():
        raise InputError(out_path, "output path is the input; refusing to overwrite raw data")
    from .staging import MemoryStack, Staging, wash_staged

    recipe.check_channels(roi.channels, roi=roi.path)
    names = [c for c, u in zip(roi.channels, roi.use, strict=True) if u]
    values = _compensation_values(names, recipe, spillover)
    notes: list[str] = []
    # a numpy ROI is staged in memory; no removed maps are kept, only their sums
    with Staging(out_path if _is_dask(roi.data) else None) as staging:
        staged, stats = wash_staged(roi, recipe, values, staging=staging, notes=notes)
        data = staged.array if isinstance(staged, MemoryStack) else staged
        write_stack(out_path, data, roi.channels, pixel_size=roi.pixel_size, settings=recipe.output)
    return {"output": str(out_path), "seconds": time.perf_counter() - started,
            "stats": stats, "notes": notes}
