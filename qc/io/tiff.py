"""OME-TIFF and plain multipage TIFF: opening a file (with its damage checks) and the tiled writer."""

from __future__ import annotations

import logging
import os
import struct
import threading
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from .._arrays import is_dask
from .._version import __version__
from ..errors import InputError
from ..files import remove_path, temporary_path, write_atomic
from .checks import check_stack_shape, one_channel, short_reason, squeeze_axes
from .cohort import OutputSettings, roi_stem
from .ome import CHANNEL_TAGS, to_micrometres
from .staged import StagedStack

#: Dask stacks bigger than this are computed into a staging file (a
#: :class:`~plexwash.qc.io.staged.StagedStack`) and written from it band by band instead of
#: being computed in memory, so memory stays bounded by chunks.
IN_MEMORY_WRITE_BYTES = 256 * 2**20
#: Pyramid levels of a stack written from a store (a staged stack: the staged wash of a big
#: ROI) are staged beside the output too when bigger than this, so writing a stack that
#: memory was kept clear of does not hold its second level (a quarter of it) in memory.
STORE_LEVEL_BYTES = 16 * 2**20
#: Tiles tifffile gathers before compressing them in parallel (its default is 512 MB,
#: which for a big stack written tile by tile would hold most of it in memory).
WRITE_BUFFER_BYTES = 32 * 2**20


def open_tiff(path: Path, *, has_stains: bool, whole_bytes: int = -1):
    """A zarr view of level 0 of the first image series, its channel names (None: plain
    TIFF), pixel size (µm) and marker names (None unless plexwash kept the tags beside them).

    A series of at most ``whole_bytes`` is read whole instead, into a numpy array (the same
    pixels, without the zarr view's per-chunk machinery), and the file is closed.
    """
    import tifffile
    import zarr

    size = path.stat().st_size
    if size == 0:
        raise InputError(path, "file is empty")
    with _TiffWarnings() as warnings:
        try:
            tif = tifffile.TiffFile(path)
            root = _refuse_absurd_ome(path, tif) if tif.is_ome else None
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
        channels = markers = None
        pixel_size = None
        if tif.is_ome:
            channels, markers, pixel_size = _ome_channels(path, tif.ome_metadata, root)
            _keep_xml(path, tif.ome_metadata)
        elif not has_stains:
            raise InputError(path, "plain TIFF has no channel names; give its stain sheet (--stains stains.csv)")
        if int(np.prod(shape)) * np.dtype(series.dtype).itemsize <= whole_bytes:
            data = series.asarray().reshape(tuple(shape[i] for i in keep))
            tif.close()
            if len(keep) == 2:
                data = data[None]
            if channels is not None and len(channels) == 0:
                channels = None
            if channels is None and not has_stains:
                raise InputError(path, "OME-XML names no channels; give its stain sheet (--stains stains.csv)")
            return data, channels, pixel_size, markers
        store = series.aszarr(level=0)
        data = zarr.open(store, mode="r")
        if keep != tuple(range(len(shape))):
            import dask.array as da

            lazy = da.from_zarr(data)
            data = lazy.reshape(tuple(shape[i] for i in keep))
        if channels is not None and len(channels) == 0:
            channels = None
        if len(keep) == 2:  # one channel: a C x Y x X stack with C = 1
            data = one_channel(data)
        if channels is None and not has_stains:
            raise InputError(path, "OME-XML names no channels; give its stain sheet (--stains stains.csv)")
        return data, channels, pixel_size, markers
    except InputError:
        tif.close()
        raise
    except Exception as exc:  # tifffile raises many types on damaged files
        tif.close()
        raise InputError(path, f"cannot read TIFF ({short_reason(exc)})") from None


def _refuse_absurd_ome(path: Path, tif):
    """Refuse OME-XML that claims more pixels than the file holds, before anything is allocated.
    Returns the parsed XML (None when it is malformed).

    Every plane of an OME-TIFF is one page of the main chain, of the size ``SizeX`` x
    ``SizeY`` (OME-TIFF specification); a claim beyond the pages would make the reader
    allocate for data that is not there.
    """
    try:
        root = ET.fromstring(tif.ome_metadata or "")
    except ET.ParseError:
        return None  # reported with the channel names
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
                         f"{planes_held}; the file is truncated or its metadata damaged")
    return root


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


def _ome_channels(path: Path, xml: str | None, root=None):
    """Channel names (acquisition tags), marker names (None unless plexwash's tag map is
    there) and (y, x) physical pixel size in µm from OME-XML (``root``: that XML already
    parsed)."""
    if not xml:
        raise InputError(path, "OME-TIFF without OME-XML")
    if root is None:
        try:
            root = ET.fromstring(xml)
        except ET.ParseError as exc:
            raise InputError(path, f"malformed OME-XML ({exc})") from None
    pixels = next((el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"), None)
    if pixels is None:
        raise InputError(path, "OME-XML has no Pixels element")
    tags = _channel_tags(root)
    names, markers = [], []
    for i, ch in enumerate(el for el in pixels if el.tag.endswith("Channel")):
        marker = (ch.get("Name") or ch.get("Fluor") or "").strip()
        name = tags.get(ch.get("ID", "")) or marker
        names.append(name.strip() or f"channel_{i}")
        markers.append(marker or names[-1])
    pixel_size = None
    try:
        sizes = [to_micrometres(pixels.get(f"PhysicalSize{a}"), pixels.get(f"PhysicalSize{a}Unit"))
                 for a in "YX"]
        if None not in sizes:
            pixel_size = (sizes[0], sizes[1])
    except ValueError:
        pixel_size = None
    return tuple(names), (tuple(markers) if tags else None), pixel_size


def _channel_tags(root) -> dict[str, str]:
    """Channel ID to acquisition tag, from plexwash's ``MapAnnotation`` (empty if none)."""
    tags: dict[str, str] = {}
    for el in root.iter():
        if el.tag.endswith("MapAnnotation") and el.get("Namespace") == CHANNEL_TAGS:
            for m in el.iter():
                if m.tag.endswith("}M") or m.tag == "M":
                    tags[m.get("K", "")] = (m.text or "").strip()
    return tags


def write_ome_tiff(path, data, channels, *, pixel_size=None, settings=None, labels=None,
                   provenance=None, source_xml=None) -> Path:
    """Write a C x Y x X stack as a tiled, compressed, pyramidal OME-TIFF, atomically.

    Level 0 is one page per channel; the lower resolution levels
    (:mod:`~plexwash.qc.io.pyramid`: 2 x 2 block means, halving until the longer side is
    at most 512 px) are SubIFDs of each page, as the OME-TIFF specification describes
    pyramids. The OME-XML (:func:`~plexwash.qc.io.ome.ome_xml`) names each channel by its
    marker, keeps the acquisition tags and the provenance in ``MapAnnotation`` s, and
    gives the pixel size in micrometres.

    A dask array is computed chunk by chunk: small stacks in memory, big ones (over
    ``IN_MEMORY_WRITE_BYTES``) into a staging file beside the output
    (:class:`~plexwash.qc.io.staged.StagedStack`, removed when done), so memory stays
    bounded by chunks and bands; big pyramid levels are staged the same way. An array
    store (zarr array, staged stack) is read band by band.

    Parameters
    ----------
    path : str or Path
        Destination; written under a temporary name and renamed when complete.
    data : numpy.ndarray, dask.array.Array or array store
        The stack, axes (C, Y, X).
    channels : sequence of str
        Acquisition channel names (tags).
    pixel_size : (float, float), optional
        Physical (y, x) pixel size in micrometres.
    settings : OutputSettings, optional
        Compression and tile size.
    labels : sequence of str, optional
        Readable marker names, written as ``Channel/@Name`` (the tags when omitted).
    provenance : mapping of str to str, optional
        Written as a ``MapAnnotation`` (tool version, hashes, date).
    source_xml : str, optional
        The input's OME-XML: its instruments and acquisition date are carried over.
    """
    import tifffile

    from .ome import ome_xml
    from .pyramid import build_levels

    settings = settings or OutputSettings()
    path = Path(path)
    channels = list(channels)
    labels = list(labels) if labels else channels
    check_stack_shape(path, data, channels)
    compression = None if settings.compression == "none" else settings.compression
    shape = tuple(int(n) for n in data.shape)
    dtype = np.dtype(data.dtype)
    xml = ome_xml(roi_stem(path.name), shape, dtype, channels, labels, pixel_size, provenance,
                  source_xml)

    def build(tmp: Path) -> None:
        spill = temporary_path(path, "spill")
        staged: list[StagedStack] = []

        def stage(level_shape, level_dtype, budget=None):
            if budget is None:  # a pyramid level
                budget = IN_MEMORY_WRITE_BYTES if in_memory else STORE_LEVEL_BYTES
            if int(np.prod(level_shape)) * level_dtype.itemsize <= budget:
                return np.empty(level_shape, level_dtype)
            spill.mkdir(exist_ok=True)
            staged.append(StagedStack(spill / f"level{len(staged)}.raw", level_shape, dtype=level_dtype))
            return staged[-1]

        in_memory = isinstance(data, np.ndarray) or (is_dask(data) and _nbytes(data) <= IN_MEMORY_WRITE_BYTES)
        try:
            if is_dask(data) and _nbytes(data) > IN_MEMORY_WRITE_BYTES:
                # computed once, chunk by chunk, into a staging file beside the output
                # (the staged wash's own mechanism), then read back band by band
                import dask.array as da

                source = stage(shape, dtype, IN_MEMORY_WRITE_BYTES)
                da.store(data, source, lock=False)
            elif is_dask(data) or isinstance(data, np.ndarray):
                source = np.asarray(data)
            else:  # an array store: read band by band
                source = data
            levels = [source, *build_levels(source, stage)]
            total = sum(_nbytes(level) for level in levels)
            with tifffile.TiffWriter(tmp, bigtiff=total > 2**32 - 2**25) as tif:
                for i, level in enumerate(levels):
                    tile = _tile_for(settings.tile, level.shape)
                    content = level if isinstance(level, np.ndarray) else _tiles(level, tile)
                    first = {"subifds": len(levels) - 1, "description": xml,
                             "software": f"plexwash {__version__}"} if i == 0 else {"subfiletype": 1}
                    tif.write(content, shape=tuple(level.shape), dtype=dtype, photometric="minisblack",
                              tile=(tile, tile), compression=compression, metadata=None,
                              buffersize=WRITE_BUFFER_BYTES, **first)
        finally:
            for stack in staged:
                stack.close()
            remove_path(spill)

    return write_atomic(path, build)


def _tile_for(tile: int, shape) -> int:
    """The tile edge for a level: the setting, no bigger than the level needs, a multiple of 16."""
    tile = min(tile, _round_up16(max(shape[1], shape[2])))
    return max(16, tile - tile % 16)


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


def source_ome_xml(path: str | Path) -> str | None:
    """The OME-XML of an OME-TIFF (None for anything else, or a file that cannot be read)."""
    import tifffile

    path = Path(path)
    if not path.is_file():
        return None
    key = _file_key(path)
    with _xml_lock:
        kept = _xml_read.get(str(path))
    if kept is not None and key is not None and kept[0] == key:
        return kept[1]  # read by open_tiff from this same file: not opened again
    try:
        with tifffile.TiffFile(path) as tif:
            return tif.ome_metadata if tif.is_ome else None
    except Exception:  # read_roi has already judged the file; nothing to carry
        return None


#: The OME-XML of the last few TIFFs :func:`open_tiff` read, with the file's identity
#: (device, inode, size, modification time): the writer carries it into the washed
#: stack (:func:`source_ome_xml`) without opening the input a second time.
_xml_read: dict[str, tuple] = {}
_xml_lock = threading.Lock()


def _file_key(path: Path):
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns


def _keep_xml(path: Path, xml) -> None:
    key = _file_key(path)
    if key is None or not isinstance(xml, str):
        return
    with _xml_lock:
        if len(_xml_read) >= 16:
            _xml_read.clear()
        _xml_read[str(path)] = (key, xml)


def tiff_levels(path: Path) -> list:
    """Every resolution level of the first series (level 0 first), as lazy dask arrays."""
    import dask.array as da
    import tifffile
    import zarr

    with tifffile.TiffFile(path) as tif:
        n_levels = len(tif.series[0].levels)
    levels = []
    for level in range(n_levels):
        store = tifffile.imread(path, aszarr=True, series=0, level=level)
        levels.append(da.from_zarr(zarr.open(store, mode="r")))
    return levels
