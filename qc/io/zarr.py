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
from .ome import COLOURS, display_windows, to_micrometres

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
    """Array, channel names, pixel size (µm) and marker names (None unless plexwash kept the
    tags) of level 0 of an OME-Zarr image (NGFF 0.4 or 0.5)."""
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
    tags = attrs.get("plexwash", {}).get("channels") if isinstance(attrs.get("plexwash"), dict) else None
    markers = None
    if isinstance(tags, list) and len(tags) == len(channels):
        # plexwash's own output: labels are markers, the tags name the channels
        channels, markers = tags, tuple(str(c) for c in channels)
    if not channels:
        raise InputError(path, "OME-Zarr has no channel labels (omero.channels[].label)")
    units = {a.get("name"): a.get("unit") for a in image.get("axes", []) if isinstance(a, dict)}
    pixel_size = None
    for transform in datasets[0].get("coordinateTransformations", []):
        if transform.get("type") == "scale":
            scale = dict(zip(axes, transform.get("scale", []), strict=False))
            if "y" in scale and "x" in scale:
                # NGFF units are optional: no unit is read as micrometres (common practice)
                sizes = [to_micrometres(scale[a], units.get(a) or "micrometer") for a in "yx"]
                pixel_size = None if None in sizes else (sizes[0], sizes[1])
    return data, tuple(str(c) for c in channels), pixel_size, markers


def write_ome_zarr(path, data, channels, *, pixel_size=None, settings=None, labels=None,
                   provenance=None, source_xml=None) -> Path:
    """Write a C x Y x X stack as a multiscale OME-Zarr image, atomically: NGFF 0.5 (Zarr v3),
    or NGFF 0.4 (Zarr v2) when ``settings.ngff`` is ``"0.4"``.

    Level ``"0"`` holds the pixels; levels ``"1"``, ``"2"``, ... are 2 x 2 block means of
    the level above (:mod:`~plexwash.qc.io.pyramid`), each computed from the one just
    written, band by band. Chunks are one channel by ``settings.tile`` pixels; the
    codec is gzip (deflate) for ``zlib`` and ``lzw`` (Zarr has no LZW codec), zstd for
    ``zstd``. Marker names go to ``omero.channels[].label``, the acquisition tags to
    ``plexwash.channels``, the provenance to ``plexwash.provenance``. NGFF has no model
    for instruments: ``source_xml`` (accepted for the same call as the OME-TIFF writer) is
    not carried.
    """
    import zarr

    from .pyramid import build_levels

    settings = settings or OutputSettings()
    path = Path(path)
    channels = list(channels)
    labels = list(labels) if labels else channels
    check_stack_shape(path, data, channels)
    tile = settings.tile
    v2 = settings.ngff == "0.4"
    compressors = _compressors(settings.compression, v2)

    def build(tmp: Path) -> None:
        group = zarr.open_group(str(tmp), mode="w", zarr_format=2 if v2 else 3)

        def new_level(shape, dtype=data.dtype):
            names = {} if v2 else {"dimension_names": ["c", "y", "x"]}
            return group.create_array(
                str(len(group)), shape=shape, dtype=dtype,
                chunks=(1, min(tile, shape[1]), min(tile, shape[2])),
                compressors=compressors, **names)

        array = new_level(tuple(data.shape))
        stack = data
        if isinstance(stack, np.ndarray):
            array[...] = stack
        else:
            if not is_dask(stack):  # an array store: read in bands of whole rows
                import dask.array as da

                stack = da.from_array(stack, chunks=(1, array.chunks[1], stack.shape[2]),
                                      lock=False, asarray=True, fancy=False)
            _store(stack.rechunk(array.chunks), array)
        levels = [array, *build_levels(array, lambda shape, dtype: new_level(shape, dtype))]
        meta = ngff_metadata(path.name, labels, levels, pixel_size)
        if v2:  # NGFF 0.4: the keys at the top, the version in each multiscale
            del meta["version"]
            meta["multiscales"][0]["version"] = "0.4"
            group.attrs.update(meta)
        else:
            group.attrs["ome"] = meta
        group.attrs["plexwash"] = {"version": __version__, "channels": channels,
                                   "provenance": dict(provenance or {})}

    return write_atomic(path, build)


def _compressors(compression: str, v2: bool):
    """Codecs for a compression choice: gzip (deflate) for zlib and lzw, zstd for zstd."""
    if compression == "none":
        return None
    if v2:
        from numcodecs import GZip, Zstd

        return [Zstd(level=3)] if compression == "zstd" else [GZip(level=6)]
    from zarr.codecs import GzipCodec, ZstdCodec

    return [ZstdCodec(level=3)] if compression == "zstd" else [GzipCodec(level=6)]


def ngff_metadata(name: str, labels: Sequence[str], levels, pixel_size=None) -> dict:
    """The ``ome`` attributes of an NGFF 0.5 multiscale image.

    ``levels`` are the arrays of the resolution levels, level 0 first (a single array
    means one level). Level ``k`` has scale ``2**k`` times the pixel size (micrometres;
    unitless when the size is unknown) and a translation of half its extra extent, so
    each block mean sits at the centre of its block. The display windows come from the
    smallest level (:func:`~plexwash.qc.io.ome.display_windows`).
    """
    if not isinstance(levels, (list, tuple)):
        levels = [levels]
    size = (1.0, 1.0) if pixel_size is None else (float(pixel_size[0]), float(pixel_size[1]))
    unit = {} if pixel_size is None else {"unit": "micrometer"}
    datasets = []
    for k in range(len(levels)):
        factor = 2.0**k
        transforms = [{"type": "scale", "scale": [1.0, size[0] * factor, size[1] * factor]}]
        if k:
            shift = (factor - 1) / 2
            transforms.append({"type": "translation", "translation": [0.0, size[0] * shift, size[1] * shift]})
        datasets.append({"path": str(k), "coordinateTransformations": transforms})
    windows = display_windows(levels[-1][...])
    return {
        "version": "0.5",
        "multiscales": [
            {
                "name": roi_stem(name),
                "axes": [
                    {"name": "c", "type": "channel"},
                    {"name": "y", "type": "space", **unit},
                    {"name": "x", "type": "space", **unit},
                ],
                "datasets": datasets,
                "type": "mean",
            }
        ],
        "omero": {
            "channels": [
                {"label": str(c), "color": COLOURS[i % len(COLOURS)], "active": True, "window": w}
                for i, (c, w) in enumerate(zip(labels, windows, strict=True))
            ],
            "rdefs": {"model": "color"},
        },
    }


def _store(data, array) -> None:
    """Store a dask array into a zarr array (chunks aligned: no lock)."""
    import dask.array as da

    da.store(data, array, lock=False)


def zarr_levels(path: Path) -> list:
    """Every resolution level of an OME-Zarr image (level 0 first), as lazy dask arrays."""
    import dask.array as da
    import zarr

    group = zarr.open_group(path, mode="r")
    attrs = dict(group.attrs)
    meta = attrs.get("ome", attrs)
    datasets = meta["multiscales"][0]["datasets"]
    return [da.from_zarr(group[d["path"]]) for d in datasets]
