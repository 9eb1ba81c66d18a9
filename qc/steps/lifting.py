"""Lifting a cleaning step from numpy to stacks and to dask, in one place.

A plane step (hot pixels, speckle) is written once, as compiled kernels on one 2-D
channel. :func:`run_stack` applies it to every channel of a (C, Y, X) stack: numpy
stacks channel by channel in threads (the kernels release the GIL), dask stacks with
one ``map_overlap`` over whole (C, y, x) blocks and ``boundary='none'`` (the kernels
treat the image edge themselves), with the depth the step declares. One channel of dask
goes through :func:`lift_channel`. Whatever the chunking, the result equals the numpy one.
"""

from __future__ import annotations

import contextlib
import contextvars
import functools
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, NamedTuple

import numpy as np

from .._arrays import is_dask
from ..errors import InputError

__all__ = ["StepResult", "kernel_outputs", "lift_channel", "per_channel_settings", "fractions_from_sums", "removed_fraction",
           "run_stack"]


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


def kernel_outputs(image: np.ndarray, out=None, removed=None):
    """The arrays a kernel fills: given views (planes of a stack) or new ones."""
    if out is None:
        out, removed = np.empty(image.shape, np.float32), np.empty(image.shape, np.float32)
    return out, removed


def lift_channel(image, kernel: Callable, depth: int, **parameters):
    """``kernel(block, **parameters)`` over a dask channel with a halo of ``depth`` pixels."""
    return image.map_overlap(
        functools.partial(kernel, **parameters),
        depth=depth,
        boundary="none",
        dtype=np.float32,
        meta=np.empty((0, 0), np.float32),
    )


def run_stack(stack, per_channel: list, channel_step, *, passive: dict, block_kernel,
               count_key: str, zone=None, spilled=None) -> StepResult:
    """Apply a step to every enabled channel of a numpy or dask stack.

    numpy: ``channel_step(c, channel, settings, out, removed)`` writes straight into the
    planes of the result stacks, channels in parallel threads (the kernels release the GIL).
    dask: ``block_kernel(c, settings) -> (kernel, depth, stats)`` gives each channel's 2-D
    block kernel; one ``map_overlap`` over whole (C, y, x) blocks applies them all, with
    the largest depth any channel needs (a larger halo never changes a kernel's result).
    One graph over whole blocks keeps memory bounded by a few blocks plus their halos.
    With a ``zone`` map (numpy, (Y, X): the ROI's background zones) each dask block kernel
    is called as ``kernel(block, zone_block)``, and with ``spilled`` (dask, the stack's
    shape) as ``kernel(block, zone_block, spilled_block)``; numpy steps take both from their
    closure.
    """
    if is_dask(stack):
        return _run_stack_dask(stack, per_channel, block_kernel, passive=passive, count_key=count_key,
                               zone=zone, spilled=spilled)
    n_channels = stack.shape[0]

    def one(c, out=None, removed=None) -> StepResult:
        s, image = per_channel[c], stack[c]
        if s.enabled:
            result = channel_step(c, image, s, out, removed)
            return result._replace(stats={"enabled": True, **result.stats})
        stats = {"enabled": False, **passive, "removed_fraction": 0.0}
        if is_dask(image):
            return StepResult(image, image * np.float32(0), stats)
        out[...] = image
        removed[...] = 0.0
        return StepResult(out, removed, stats)

    from .._threads import one_thread

    cleaned = np.empty(stack.shape, np.float32)
    removed = np.empty(stack.shape, np.float32)

    def store(c):
        return one(c, cleaned[c], removed[c]).stats

    workers = min(n_channels, os.cpu_count() or 1)
    if workers <= 1:  # no threads of ours here (e.g. one channel per call, as a wash makes them)
        stats = [store(c) for c in range(n_channels)]
    else:
        with one_thread(), ThreadPoolExecutor(max_workers=workers) as pool:
            # kernels run in parallel threads; keep BLAS pools out of their way
            stats = list(pool.map(store, range(n_channels)))
    return StepResult(cleaned, removed, stats)


def _run_stack_dask(stack, per_channel: list, block_kernel, *, passive: dict, count_key: str,
                    zone=None, spilled=None) -> StepResult:
    chunks = stack.chunks
    stack = stack.rechunk({0: -1})  # every block holds all channels: kernels index them
    kernels = [block_kernel(c, s) if s.enabled else None for c, s in enumerate(per_channel)]
    depth = max((k[1] for k in kernels if k is not None), default=0)

    def apply(block, zone_block=None, spilled_block=None):
        out = np.empty(block.shape, np.float32)
        for c, kernel in enumerate(kernels):
            extra = () if zone_block is None else (zone_block[0],)
            if spilled_block is not None:
                extra += (spilled_block[c],)
            out[c] = kernel[0](block[c], *extra) if kernel is not None else block[c]
        return out

    if depth:
        arrays = [stack]
        if zone is not None or spilled is not None:
            import dask.array as da

            plane = np.zeros(stack.shape[1:], np.uint8) if zone is None else np.asarray(zone)
            arrays.append(da.from_array(plane[None], chunks=((1,),) + tuple(stack.chunks[1:])))
        if spilled is not None:
            arrays.append(spilled.rechunk(stack.chunks))
        cleaned = da_map_overlap(apply, arrays, depth={0: 0, 1: depth, 2: depth})
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
                      "removed_fraction": removed_fraction(removed[c], stack[c])})
    return StepResult(cleaned, removed, stats)



def da_map_overlap(function, arrays: list, *, depth: dict):
    """``dask.array.map_overlap`` of ``function`` over ``arrays`` (boundary 'none', float32 out)."""
    import dask.array as da

    return da.map_overlap(function, *arrays, depth=depth, boundary="none", dtype=np.float32,
                          meta=np.empty((0, 0, 0), np.float32))


def removed_fraction(removed, image):
    """Fraction of the channel's signal that was removed (0 when the channel has none).

    For dask input a 0-d dask array (array arithmetic only: in dask 2026.8 computing
    ``Delayed`` objects together with arrays in one ``dask.compute`` misorders results).
    None for numpy input inside :func:`fractions_from_sums` (the caller makes it).
    """
    if not _OWN_FRACTIONS.get() and not is_dask(removed):
        return None
    part, total = removed.sum(dtype=np.float64), image.sum(dtype=np.float64)
    if is_dask(removed):
        return part * (total > 0) / np.maximum(total, np.finfo(np.float64).tiny)
    return float(part) / float(total) if total > 0 else 0.0


def per_channel_settings(settings, kind, n_channels: int) -> list:
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


#: Whether a numpy step computes its own ``removed_fraction`` (see :func:`fractions_from_sums`).
_OWN_FRACTIONS = contextvars.ContextVar("plexwash_own_fractions", default=True)


@contextlib.contextmanager
def fractions_from_sums():
    """Within this block (this thread), the numpy steps called here leave their
    ``removed_fraction`` stat None instead of summing both planes again: for a wash, whose rows
    take the fraction from the sums it makes of every plane anyway
    (:func:`plexwash.qc.steps.stats.step_rows` overwrites the step's own). Threads started
    inside the block (a stack's channels on a pool) still compute it."""
    token = _OWN_FRACTIONS.set(False)
    try:
        yield
    finally:
        _OWN_FRACTIONS.reset(token)
