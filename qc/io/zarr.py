"""OME-Zarr (NGFF 0.4 / 0.5): opening an image (with its damage check), the writer and its metadata."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from .._arrays import is_dask
from .._version import __version__
from ..errors import InputError
from ..files import write_atomic
from .checks import check_stack_shape, one_channel, short_reason, squeeze_axes
from .cohort import OutputSettings, roi_stem

#: A stack that claims more than this many bytes, and more than ``ABSURD_RATIO`` times
#: the bytes it stores, is refused as damaged metadata (no compressor packs real
#: images that tightly; common practice).
ABSURD_BYTES, ABSURD_RATIO = 16 * 2**30, 10_000


def _refuse_absurd_zarr(path: Path, array) -> None:
    claimed = int(np.prod([int(n) for n in array.shape], dtype=object)) * np.dtype(array.dtype).itemsize
    if claimed <= ABSURD_BYTES:
        return
    stored = sum(f.stat().st_size for f in path.rglob("*") if f.is_file())
    if claimed > ABSURD_RATIO * stored:
        shape = " x ".join(str(int(n)) for n in array.shape)
        raise InputError(path, f"metadata claims a {shape} array ({claimed / 2**30:.3g} GiB) but the "
                         f"folder holds {stored} bytes; refusing the damaged metadata")


def open_zarr(path: Path):
    """Array, channel labels and pixel size of an OME-Zarr image (NGFF 0.4 or 0.5)."""
    import zarr

    try:
        group = zarr.open_group(path, mode="r")
    except Exception as exc:
        raise InputError(path, f"not a readable OME-Zarr folder ({short_reason(exc)})") from None
    attrs = dict(group.attrs)
    meta = attrs.get("ome", attrs)  # 0.5 nests under "ome"; 0.4 keeps keys at the top
    multiscales = meta.get("multiscales")
    if not multiscales:
        raise InputError(path, "OME-Zarr without multiscales metadata")
    image = multiscales[0]
    axes = [a["name"] if isinstance(a, dict) else str(a) for a in image.get("axes", [])]
    datasets = image.get("datasets") or []
    if not datasets:
        raise InputError(path, "OME-Zarr multiscales lists no datasets")
    try:
        array = group[datasets[0]["path"]]
    except Exception:
        raise InputError(path, f"OME-Zarr dataset {datasets[0].get('path')!r} missing") from None
    _refuse_absurd_zarr(path, array)
    if not axes:
        axes = ["c", "y", "x"][-array.ndim :]
    keep = squeeze_axes(path, "".join(a.upper() for a in axes), tuple(array.shape))
    data = array
    if keep != tuple(range(array.ndim)):
        import dask.array as da

        data = da.from_zarr(array).reshape(tuple(array.shape[i] for i in keep))
    if len(keep) == 2:  # one channel: a C x Y x X stack with C = 1
        data = one_channel(data)
    channels = [c.get("label", "") for c in meta.get("omero", {}).get("channels", [])]
    if not channels:
        raise InputError(path, "OME-Zarr has no channel labels (omero.channels[].label)")
    pixel_size = None
    for transform in datasets[0].get("coordinateTransformations", []):
        if transform.get("type") == "scale":
            scale = dict(zip(axes, transform.get("scale", []), strict=False))
            if "y" in scale and "x" in scale:
                pixel_size = (float(scale["y"]), float(scale["x"]))
    return data, tuple(str(c) for c in channels), pixel_size


def write_ome_zarr(path, data, channels, *, pixel_size=None, settings=None) -> Path:
    """Write a C x Y x X stack as an OME-Zarr image (NGFF 0.5, Zarr v3), atomically.

    Channel names go to ``omero.channels[].label``; chunks are one channel by
    ``settings.tile`` pixels; zstd compressed unless ``compression = "none"``.
    """
    import zarr
    from zarr.codecs import ZstdCodec

    settings = settings or OutputSettings()
    path = Path(path)
    channels = list(channels)
    check_stack_shape(path, data, channels)
    tile = settings.tile

    def build(tmp: Path) -> None:
        group = zarr.open_group(str(tmp), mode="w", zarr_format=3)
        compressors = None if settings.compression == "none" else [ZstdCodec(level=3)]
        if settings.compression == "zlib":
            from zarr.codecs import GzipCodec

            compressors = [GzipCodec(level=6)]
        array = group.create_array(
            "0",
            shape=data.shape,
            dtype=data.dtype,
            chunks=(1, min(tile, data.shape[1]), min(tile, data.shape[2])),
            compressors=compressors,
            dimension_names=["c", "y", "x"],
        )
        stack = data
        if isinstance(stack, np.ndarray):
            array[...] = stack
        else:
            if not is_dask(stack):  # an array store: read in bands of whole rows
                import dask.array as da

                stack = da.from_array(stack, chunks=(1, array.chunks[1], stack.shape[2]),
                                      lock=False, asarray=True, fancy=False)
            _store(stack.rechunk(array.chunks), array)
        group.attrs["ome"] = ngff_metadata(path.name, channels, data, pixel_size)
        group.attrs["plexwash"] = {"version": __version__}

    return write_atomic(path, build)


def ngff_metadata(name: str, channels: Sequence[str], data, pixel_size=None) -> dict:
    """The ``ome`` attributes of an NGFF 0.5 image with one resolution level."""
    scale = [1.0, 1.0, 1.0]
    if pixel_size is not None:
        scale = [1.0, float(pixel_size[0]), float(pixel_size[1])]
    dtype = np.dtype(data.dtype)
    top = float(np.iinfo(dtype).max) if dtype.kind in "ui" else 1.0
    return {
        "version": "0.5",
        "multiscales": [
            {
                "name": roi_stem(name),
                "axes": [
                    {"name": "c", "type": "channel"},
                    {"name": "y", "type": "space", "unit": "micrometer"},
                    {"name": "x", "type": "space", "unit": "micrometer"},
                ],
                "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale", "scale": scale}]}],
            }
        ],
        "omero": {
            "channels": [
                {
                    "label": str(c),
                    "color": "FFFFFF",
                    "active": True,
                    "window": {"min": 0.0, "max": top, "start": 0.0, "end": top},
                }
                for c in channels
            ],
            "rdefs": {"model": "greyscale"},
        },
    }


def _store(data, array) -> None:
    """Store a dask array into a zarr array (chunks aligned: no lock)."""
    import dask.array as da

    da.store(data, array, lock=False)
