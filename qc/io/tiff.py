"""OME-TIFF and plain multipage TIFF: opening a file (with its damage checks) and the tiled writer."""

from __future__ import annotations

import logging
import struct
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from .._arrays import is_dask
from .._version import __version__
from ..errors import InputError
from ..files import remove_path, temporary_path, write_atomic
from .checks import check_stack_shape, one_channel, short_reason, squeeze_axes
from .cohort import OutputSettings
from .staged import StagedStack

#: Dask stacks bigger than this are computed into a staging file (a
#: :class:`~plexwash.qc.io.staged.StagedStack`) and written from it band by band instead of
#: being computed in memory, so memory stays bounded by chunks.
IN_MEMORY_WRITE_BYTES = 256 * 2**20
#: Tiles tifffile gathers before compressing them in parallel (its default is 512 MB,
#: which for a big stack written tile by tile would hold most of it in memory).
WRITE_BUFFER_BYTES = 32 * 2**20


def open_tiff(path: Path, *, has_panel: bool):
    """A zarr view of the first image series, its channel names (None: plain TIFF), pixel size."""
    import tifffile
    import zarr

    size = path.stat().st_size
    if size == 0:
        raise InputError(path, "file is empty")
    with _TiffWarnings() as warnings:
        try:
            tif = tifffile.TiffFile(path)
            if tif.is_ome:
                _refuse_absurd_ome(path, tif)
            series = tif.series[0] if tif.series else None
        except InputError:
            tif.close()
            raise
        except (tifffile.TiffFileError, ValueError, OSError, struct.error, IndexError) as exc:
            if _has_tiff_header(path):
                raise InputError(path, f"file is truncated or damaged ({short_reason(exc)})") from None
            raise InputError(path, f"not a readable TIFF file ({short_reason(exc)})") from None
    try:
        if series is None:
            raise InputError(path, "TIFF holds no image")
        if warnings.damage:
            raise InputError(path, f"file is truncated or damaged ({short_reason(warnings.damage[0])})")
        _refuse_truncated(path, series, size)
        axes = series.axes.upper()
        shape = tuple(series.shape)
        keep = squeeze_axes(path, axes, shape, plain=not tif.is_ome)
        channels = None
        pixel_size = None
        if tif.is_ome:
            channels, pixel_size = _ome_channels(path, tif.ome_metadata)
        elif not has_panel:
            raise InputError(path, "plain TIFF has no channel names; give its panel (--panel panel.csv)")
        store = series.aszarr()
        data = zarr.open(store, mode="r")
        if keep != tuple(range(len(shape))):
            import dask.array as da

            lazy = da.from_zarr(data)
            data = lazy.reshape(tuple(shape[i] for i in keep))
        if channels is not None and len(channels) == 0:
            channels = None
        if len(keep) == 2:  # one channel: a C x Y x X stack with C = 1
            data = one_channel(data)
        if channels is None and not has_panel:
            raise InputError(path, "OME-XML names no channels; give its panel (--panel panel.csv)")
        return data, channels, pixel_size
    except InputError:
        tif.close()
        raise
    except Exception as exc:  # tifffile raises many types on damaged files
        tif.close()
        raise InputError(path, f"cannot read TIFF ({short_reason(exc)})") from None


def _refuse_absurd_ome(path: Path, tif) -> None:
    """Refuse OME-XML that claims more pixels than the file holds, before anything is allocated.

    Every plane of an OME-TIFF is one page of the main chain, of the size ``SizeX`` x
    ``SizeY`` (OME-TIFF specification); a claim beyond the pages would make the reader
    allocate for data that is not there.
    """
    try:
        root = ET.fromstring(tif.ome_metadata or "")
    except ET.ParseError:
        return  # reported with the channel names
    first = tif.pages.first
    planes_held = len(tif.pages)
    planes_claimed = 0
    for pixels in (el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"):
        try:
            sizes = {k: int(pixels.get(f"Size{k}", "1")) for k in "XYCZT"}
        except ValueError:
            raise InputError(path, "OME-XML Pixels sizes are not whole numbers") from None
        if min(sizes.values()) < 1:
            raise InputError(path, f"OME-XML claims an empty image ({_sizes(sizes)})")
        samples = int(getattr(first, "samplesperpixel", 1) or 1)
        planes_claimed += sizes["C"] * sizes["Z"] * sizes["T"] // max(1, samples)
        if planes_claimed == sizes["C"] * sizes["Z"] * sizes["T"] // max(1, samples) and (
                sizes["X"] != int(first.imagewidth) or sizes["Y"] != int(first.imagelength)):
            raise InputError(path, f"OME-XML claims {_sizes(sizes)} but the file's images are "
                             f"{first.imagewidth} x {first.imagelength} px; refusing the damaged metadata")
    if planes_claimed > planes_held:
        raise InputError(path, f"OME-XML claims {planes_claimed} image planes but the file holds "
                         f"{planes_held}; refusing the damaged metadata")


def _sizes(sizes: dict) -> str:
    return f"{sizes['C']} channel(s) of {sizes['X']} x {sizes['Y']} px"


def _has_tiff_header(path: Path) -> bool:
    """True when the file starts like a TIFF or BigTIFF (TIFF 6.0 spec, section 2)."""
    with open(path, "rb") as fh:
        head = fh.read(4)
    return head in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")


def _refuse_truncated(path: Path, series, size: int) -> None:
    """tifffile opens a cut-off file without complaint; check every block lies inside it."""
    for page in series.pages:
        if page is None:
            raise InputError(path, "file is truncated (pages missing)")
        offsets = getattr(page, "dataoffsets", ())
        counts = getattr(page, "databytecounts", ())
        if not offsets:
            continue
        end = max(int(o) + int(c) for o, c in zip(offsets, counts, strict=False))
        if end > size:
            raise InputError(path, f"file is truncated ({size} bytes, image data needs {end})")


class _TiffWarnings(logging.Handler):
    """Collect tifffile's logged warnings while a file is opened (they signal damage)."""

    def __init__(self):
        super().__init__(logging.WARNING)
        self.damage: list[str] = []

    def emit(self, record):
        self.damage.append(record.getMessage())

    def __enter__(self):
        self._logger = logging.getLogger("tifffile")
        self._saved = (self._logger.propagate, self._logger.level)
        self._logger.addHandler(self)
        self._logger.propagate = False
        return self

    def __exit__(self, *exc):
        self._logger.removeHandler(self)
        self._logger.propagate = self._saved[0]


def _ome_channels(path: Path, xml: str | None):
    """Channel names and (y, x) physical pixel size from OME-XML."""
    if not xml:
        raise InputError(path, "OME-TIFF without OME-XML")
    try:
        root = ET.fromstring(xml)
    except ET.ParseError as exc:
        raise InputError(path, f"malformed OME-XML ({exc})") from None
    pixels = next((el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"), None)
    if pixels is None:
        raise InputError(path, "OME-XML has no Pixels element")
    names = []
    for i, ch in enumerate(el for el in pixels if el.tag.endswith("Channel")):
        name = ch.get("Name") or ch.get("Fluor") or ""
        names.append(name.strip() or f"channel_{i}")
    pixel_size = None
    try:
        px, py = pixels.get("PhysicalSizeX"), pixels.get("PhysicalSizeY")
        if px and py:
            pixel_size = (float(py), float(px))
    except ValueError:
        pixel_size = None
    return tuple(names), pixel_size


def write_ome_tiff(path, data, channels, *, pixel_size=None, settings=None) -> Path:
    """Write a C x Y x X stack as a tiled, compressed OME-TIFF, atomically.

    A dask array is computed chunk by chunk: small stacks in memory, big ones (over
    ``IN_MEMORY_WRITE_BYTES``) into a staging file beside the output
    (:class:`~plexwash.qc.io.staged.StagedStack`, removed when done), so memory stays
    bounded by chunks and bands. An array store (zarr array, staged stack) is read band
    by band.

    Parameters
    ----------
    path : str or Path
        Destination; written under a temporary name and renamed when complete.
    data : numpy.ndarray, dask.array.Array or array store
        The stack, axes (C, Y, X).
    channels : sequence of str
        Channel names, written to OME-XML ``Channel/@Name``.
    pixel_size : (float, float), optional
        Physical (y, x) pixel size in micrometres.
    settings : OutputSettings, optional
        Compression and tile size.
    """
    import tifffile

    settings = settings or OutputSettings()
    path = Path(path)
    channels = list(channels)
    check_stack_shape(path, data, channels)
    tile = min(settings.tile, _round_up16(max(data.shape[1], data.shape[2])))
    tile = max(16, tile - tile % 16)
    metadata = {"axes": "CYX", "Channel": {"Name": channels}}
    if pixel_size is not None:
        metadata.update(
            PhysicalSizeY=float(pixel_size[0]),
            PhysicalSizeX=float(pixel_size[1]),
            PhysicalSizeYUnit="µm",
            PhysicalSizeXUnit="µm",
        )
    compression = None if settings.compression == "none" else settings.compression

    def build(tmp: Path) -> None:
        def write(content, **kwargs) -> None:
            tifffile.imwrite(
                tmp,
                content,
                ome=True,
                photometric="minisblack",
                tile=(tile, tile),
                compression=compression,
                metadata=metadata,
                software=f"plexwash {__version__}",
                buffersize=WRITE_BUFFER_BYTES,
                **kwargs,
            )

        shape = {"shape": tuple(data.shape), "dtype": np.dtype(data.dtype)}
        if is_dask(data) and _nbytes(data) > IN_MEMORY_WRITE_BYTES:
            # computed once, chunk by chunk, into a staging file beside the output
            # (the staged wash's own mechanism), then read back band by band
            import dask.array as da

            spill = temporary_path(path, "spill")
            spill.mkdir()
            try:
                with StagedStack(spill / "stack.raw", data.shape, dtype=data.dtype) as staged:
                    da.store(data, staged, lock=False)
                    write(_tiles(staged, tile), **shape)
            finally:
                remove_path(spill)
        elif is_dask(data) or isinstance(data, np.ndarray):
            write(np.asarray(data))
        else:  # an array store: read band by band
            write(_tiles(data, tile), **shape)

    return write_atomic(path, build)




def _round_up16(n: int) -> int:
    return int(-(-n // 16) * 16)


def _nbytes(data) -> int:
    return int(np.prod(data.shape)) * np.dtype(data.dtype).itemsize


def _tiles(array, tile: int) -> Iterator[np.ndarray]:
    """Tiles in TIFF order: channel by channel, then row-major; read one band of rows at a time."""
    n_c, n_y, n_x = array.shape
    for c in range(n_c):
        for y in range(0, n_y, tile):
            band = np.asarray(array[c, y : y + tile, 0:n_x])
            for x in range(0, n_x, tile):
                yield np.ascontiguousarray(band[:, x : x + tile])
