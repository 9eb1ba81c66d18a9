"""Shape helpers and messages shared by the TIFF and Zarr readers and writers."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from .._arrays import is_dask
from ..errors import InputError


def squeeze_axes(path: Path, axes: str, shape: tuple[int, ...], *, plain: bool = False) -> tuple[int, ...]:
    """Indices of the axes to keep so the data becomes (C, Y, X) or (Y, X).

    Singleton T and Z axes are dropped. In a plain (non-OME) TIFF the one remaining
    non-spatial axis (pages ``I``, samples ``S``, ImageJ slices ``Z``...) holds the channels.
    """
    keep = []
    for i, (ax, n) in enumerate(zip(axes, shape, strict=True)):
        if ax not in "YX" and n == 1 and ax != "C":
            continue
        if plain and ax not in "YX":
            ax = "C"
        keep.append((ax, i))
    letters = "".join(a for a, _ in keep)
    if letters not in ("CYX", "YX"):
        raise InputError(path, f"unsupported axes {axes!r} with shape {shape} (expected CYX)")
    return tuple(i for _, i in keep)


def one_channel(data):
    """A (Y, X) array (zarr or dask) as a lazy (1, Y, X) stack."""
    import dask.array as da

    lazy = data if is_dask(data) else da.from_zarr(data)
    return lazy[None]


def check_stack_shape(path: Path, data, channels: Sequence[str]) -> None:
    if data.ndim != 3:
        raise InputError(path, f"expected a C x Y x X stack to write, got {data.ndim}-D")
    if len(channels) != data.shape[0]:
        raise InputError(path, f"{len(channels)} channel names for {data.shape[0]} channels")


def short_reason(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or exc.__class__.__name__
    return text if len(text) <= 120 else text[:117] + "..."
