"""Array helpers shared by the engine: numpy or dask, float32 stacks, used channels.

One place for the questions every step asks of its input: is it a lazy (dask) array,
is it a real-valued 2-D channel or 3-D stack, which channels of an ROI take part in the
wash, and how to read one channel of a (possibly lazy) stack into memory.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .errors import InputError


def is_dask(array) -> bool:
    """Whether ``array`` is a dask collection (a lazy array), by its type's module.

    Examples
    --------
    >>> is_dask(np.zeros(3))
    False
    """
    return type(array).__module__.split(".")[0] == "dask"


def as_float32(array, what: str, ndim: int):
    """``array`` as float32 with ``ndim`` dimensions, at least 3 x 3 pixels, numpy or dask.

    Raises
    ------
    InputError
        Named by ``what``: wrong number of dimensions, not real numbers, too small.
    """
    if not is_dask(array):
        array = np.asarray(array)
    dtype = array.dtype
    if array.ndim != ndim:
        shape = "x".join(str(n) for n in array.shape) or "scalar"
        raise InputError(what, f"expected a {ndim}-D array, got shape {shape}")
    if not (np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.floating)):
        raise InputError(what, f"expected real numbers, got dtype {dtype}")
    if any(n < 3 for n in array.shape[-2:]):
        raise InputError(what, f"needs at least 3 x 3 pixels, got {array.shape[-2]} x {array.shape[-1]}")
    if is_dask(array):
        return array.astype(np.float32)
    return np.ascontiguousarray(array, dtype=np.float32)


def as_channel(image, what: str = "image"):
    """One channel (Y, X) as float32 (see :func:`as_float32`)."""
    return as_float32(image, what, 2)


def as_stack(stack, what: str = "stack"):
    """A (C, Y, X) stack as float32 (see :func:`as_float32`)."""
    return as_float32(stack, what, 3)


def used_channels(use: Sequence[bool]) -> list[int]:
    """Indices of the channels that take part in the wash (the stain sheet's ``wash = yes``)."""
    return [i for i, u in enumerate(use) if u]


def channel_plane(data, c: int, *, dtype=None, scheduler=None) -> np.ndarray:
    """Channel ``c`` of a (C, Y, X) stack as a numpy array (of ``dtype`` when given).

    The chunks of a dask stack are stored straight into the new array, without the
    copy that concatenating them would make. ``scheduler`` is dask's (e.g.
    ``"synchronous"`` inside a task that already runs on dask's threads).
    """
    if not is_dask(data):
        return np.asarray(data[c], dtype=dtype)
    import dask.array as da

    plane = np.empty(tuple(data.shape[1:]), dtype or data.dtype)
    source = data[c] if plane.dtype == data.dtype else data[c].astype(plane.dtype)
    da.store(source, plane, lock=False, scheduler=scheduler)
    return plane


def stack_planes(planes: Sequence) -> object:
    """Stack 2-D planes (all numpy or some dask) into one (C, Y, X) float32 array."""
    if any(is_dask(p) for p in planes):
        import dask.array as da

        return da.stack([p if is_dask(p) else da.from_array(p) for p in planes])
    out = np.empty((len(planes),) + tuple(planes[0].shape), np.float32)
    for k, plane in enumerate(planes):
        out[k] = plane
    return out
