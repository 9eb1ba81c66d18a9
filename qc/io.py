"""Reading ROIs (OME-TIFF, TIFF + panel, OME-Zarr) and writing washed stacks atomically.

Every problem with an input is raised as :class:`~plexwash.qc.errors.InputError`
naming the file, so the CLI can print one line and exit 2. Inputs are opened read-only;
outputs are written to a temporary name in the destination folder and renamed at the end.
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import json
import logging
import struct
import xml.etree.ElementTree as ET
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np

from ._arrays import is_dask
from ._version import __version__
from .errors import InputError
from .files import remove_path, temporary_path, write_atomic
from .settings import setting

#: Stacks bigger than this are read lazily (dask) instead of into memory.
LAZY_BYTES = 128 * 2**20
#: Output stacks bigger than this are spilled through a temporary zarr store instead of
#: being computed in memory, so memory stays bounded by chunks.
IN_MEMORY_WRITE_BYTES = 256 * 2**20
#: Tiles tifffile gathers before compressing them in parallel (its default is 512 MB,
#: which for a big stack written tile by tile would hold most of it in memory).
WRITE_BUFFER_BYTES = 32 * 2**20

SUPPORTED_DTYPES = (np.uint8, np.uint16, np.uint32, np.int16, np.int32, np.float32, np.float64)
TIFF_SUFFIXES = (".ome.tiff", ".ome.tif", ".tiff", ".tif")
ZARR_SUFFIXES = (".ome.zarr", ".zarr")


@dataclasses.dataclass(frozen=True)
class OutputSettings:
    """How washed stacks are written (recipe section ``[output]``)."""

    enabled: bool = setting(True, "write washed stacks (false: measure quality only)")
    format: str = setting("ome-tiff", "file format of washed stacks", choices=("ome-tiff", "ome-zarr"))
    compression: str = setting(
        "zstd", "lossless compression (zstd: fastest measured here)", choices=("zstd", "zlib", "none")
    )
    tile: int = setting(512, "tile / chunk edge in pixels", low=64, high=4096)


@dataclasses.dataclass(frozen=True)
class Roi:
    """One region of interest: a C x Y x X stack with channel names.

    Attributes
    ----------
    data : numpy.ndarray or dask.array.Array
        Pixel values, axes (C, Y, X); dask for inputs larger than ``LAZY_BYTES``.
    channels : tuple of str
        Acquisition channel names, in stack order.
    path : Path
        The file or folder the ROI was read from.
    labels : tuple of str
        Readable target names (from the panel; the channel names otherwise).
    use : tuple of bool
        False for channels the panel marks ``no``: they pass through untouched.
    pixel_size : tuple of float or None
        Physical (y, x) pixel size in micrometres, when the file records it.
    """

    data: object
    channels: tuple[str, ...]
    path: Path
    labels: tuple[str, ...] = ()
    use: tuple[bool, ...] = ()
    pixel_size: tuple[float, float] | None = None

    def __post_init__(self):
        if not self.labels:
            object.__setattr__(self, "labels", tuple(self.channels))
        if not self.use:
            object.__setattr__(self, "use", (True,) * len(self.channels))

    @property
    def name(self) -> str:
        """The ROI's name: its file name without the image suffixes."""
        return roi_stem(self.path)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.data.shape)

    def channel_index(self, channel: str) -> int:
        """Index of a channel by name (or by panel label)."""
        if channel in self.channels:
            return self.channels.index(channel)
        if channel in self.labels:
            return self.labels.index(channel)
        raise InputError(self.path, f"no channel named {channel!r}")


@dataclasses.dataclass(frozen=True)
class Panel:
    """The panel: acquisition channel names, readable labels and whether each is cleaned."""

    channels: tuple[str, ...]
    labels: tuple[str, ...]
    use: tuple[bool, ...]
    path: Path | None = None


def roi_stem(path: str | Path) -> str:
    """File name of an ROI without its image suffixes.

    Examples
    --------
    >>> roi_stem("cohort/roi_01.ome.tiff")
    'roi_01'
    >>> roi_stem("out/roi_02.ome.zarr")
    'roi_02'
    """
    name = Path(path).name
    for suffix in TIFF_SUFFIXES + ZARR_SUFFIXES:
        if name.lower().endswith(suffix):
            return name[: -len(suffix)]
    return Path(name).stem


def is_roi_path(path: str | Path) -> bool:
    """True when the name looks like an ROI plexwash can read (TIFF or Zarr)."""
    name = Path(path).name.lower()
    return not name.startswith(".") and name.endswith(TIFF_SUFFIXES + ZARR_SUFFIXES)


def list_cohort(folder: str | Path) -> list[Path]:
    """ROI files and folders of a cohort, sorted by name.

    Raises
    ------
    InputError
        When the folder does not exist or holds no ROI.
    """
    folder = Path(folder)
    if folder.is_file():
        raise InputError(folder, "is a file; give the folder that holds the cohort's ROIs")
    if not folder.is_dir():
        raise InputError(folder, "cohort folder not found")
    rois = sorted(p for p in folder.iterdir() if is_roi_path(p))
    if not rois:
        raise InputError(folder, "no ROI found (expected .ome.tiff, .tiff or .ome.zarr files)")
    return rois


# --------------------------------------------------------------------------- panel


def read_panel(path: str | Path) -> Panel:
    """Read ``panel.csv`` (columns ``channel,label,use``; ``use`` is ``yes`` or ``no``).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "panel.csv"
    >>> _ = p.write_text("channel,label,use\\nNd145,membrane,yes\\nIr191,DNA,no\\n")
    >>> read_panel(p).use
    (True, False)
    """
    path = Path(path)
    rows = _read_csv_rows(path, required=("channel", "label", "use"))
    channels, labels, use = [], [], []
    for number, row in rows:
        name = (row.get("channel") or "").strip()
        if not name:
            raise InputError(path, f"row {number}: empty channel name")
        flag = (row.get("use") or "").strip().lower()
        if flag not in ("yes", "no"):
            raise InputError(path, f"row {number}: use must be 'yes' or 'no', got {flag!r}")
        channels.append(name)
        labels.append((row.get("label") or "").strip() or name)
        use.append(flag == "yes")
    refuse_duplicates(path, channels, "channel")
    return Panel(tuple(channels), tuple(labels), tuple(use), path)


def read_csv_cells(path: Path) -> list[tuple[int, list[str]]]:
    """The non-blank rows of a small CSV file as (line number, cells).

    One-line errors for a missing, unreadable or empty file; the callers check the cells.
    """
    if not path.exists():
        raise InputError(path, "file not found")
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"cannot read ({exc})") from None
    rows = [(line, cells) for line, cells in enumerate(csv.reader(text.splitlines()), start=1)
            if any(cell.strip() for cell in cells)]
    if not rows:
        raise InputError(path, "file is empty")
    return rows


def _read_csv_rows(path: Path, *, required: Sequence[str]) -> list[tuple[int, dict]]:
    """Rows of a small CSV as (line number, dict), checking the header names ``required``."""
    rows = read_csv_cells(path)
    header = [h.strip() for h in rows[0][1]]
    missing = [c for c in required if c not in header]
    if missing:
        raise InputError(path, f"missing column(s) {', '.join(missing)}; expected {','.join(required)}")
    body = [(line, dict(zip(header, cells, strict=False))) for line, cells in rows[1:]]
    if not body:
        raise InputError(path, "no rows below the header")
    return body


def refuse_duplicates(path, names: Sequence[str], what: str, *,
                       message: str = "duplicate {what} name(s): {names}") -> None:
    """Raise InputError naming every name that occurs more than once, in first-seen order."""
    seen, dups = set(), []
    for name in names:
        if name in seen and name not in dups:
            dups.append(name)
        seen.add(name)
    if dups:
        raise InputError(path, message.format(what=what, names=", ".join(dups)))


def _apply_panel(path: Path, channels: tuple[str, ...] | None, n_channels: int, panel: Panel):
    """Channel names, labels and use flags of an ROI given its panel."""
    where = panel.path or path
    if channels is None:  # plain TIFF: the panel names the pages in order
        if len(panel.channels) != n_channels:
            raise InputError(
                where,
                f"panel lists {len(panel.channels)} channels but {path.name} has {n_channels}",
            )
        return panel.channels, panel.labels, panel.use
    unknown = [c for c in panel.channels if c not in channels]
    absent = [c for c in channels if c not in panel.channels]
    if unknown or absent:
        parts = []
        if unknown:
            parts.append(f"not in {path.name}: {', '.join(unknown)}")
        if absent:
            parts.append(f"missing from the panel: {', '.join(absent)}")
        raise InputError(where, "panel rows do not match the ROI's channels (" + "; ".join(parts) + ")")
    order = [panel.channels.index(c) for c in channels]
    return channels, tuple(panel.labels[i] for i in order), tuple(panel.use[i] for i in order)


# --------------------------------------------------------------------------- reading


def read_roi(path: str | Path, *, panel: str | Path | Panel | None = None, lazy: bool | None = None) -> Roi:
    """Read one ROI: OME-TIFF, plain multipage TIFF with a panel, or OME-Zarr (NGFF 0.4/0.5).

    Parameters
    ----------
    path : str or Path
        The image file (``.ome.tiff``, ``.tiff``) or OME-Zarr folder.
    panel : str, Path or Panel, optional
        ``panel.csv``: required for a plain TIFF (it names the pages in order); for
        OME files it adds labels and ``use`` flags and must list the same channels.
    lazy : bool, optional
        Force a dask array (True) or numpy (False). By default stacks over
        ``LAZY_BYTES`` are read lazily, chunk by chunk.

    Returns
    -------
    Roi

    Raises
    ------
    InputError
        Missing, empty, unreadable or truncated file; unknown axes; metadata claiming
        more pixels than the file holds; duplicate channel names; panel not matching;
        NaN, Inf or negative pixels. A single-channel image reads as a 1 x Y x X stack.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "tiny.ome.tiff"
    >>> _ = write_ome_tiff(path, np.ones((2, 8, 8), np.float32), ["Nd145", "Ir191"])
    >>> roi = read_roi(path)
    >>> roi.channels, roi.shape
    (('Nd145', 'Ir191'), (2, 8, 8))
    """
    path = Path(path)
    if isinstance(panel, (str, Path)):
        panel = read_panel(panel)
    if not path.exists():
        raise InputError(path, "file not found")
    if path.is_dir():
        data, channels, pixel_size = _open_zarr(path)
    else:
        data, channels, pixel_size = _open_tiff(path, has_panel=panel is not None)
    if data.ndim != 3:
        raise InputError(path, f"expected a C x Y x X stack, got {data.ndim}-D data")
    if np.dtype(data.dtype).type not in SUPPORTED_DTYPES:
        raise InputError(path, f"unsupported pixel type {data.dtype}")
    n_channels = int(data.shape[0])
    if channels is not None and len(channels) != n_channels:
        raise InputError(path, f"metadata names {len(channels)} channels but the stack has {n_channels}")
    if panel is not None:
        channels, labels, use = _apply_panel(path, channels, n_channels, panel)
    else:
        labels, use = (), ()
    if any(not c.strip() for c in channels):
        raise InputError(path, "a channel has an empty name")
    refuse_duplicates(path, channels, "channel")

    nbytes = int(np.prod(data.shape)) * np.dtype(data.dtype).itemsize
    if lazy is None:
        lazy = nbytes > LAZY_BYTES
    import dask.array as da

    if lazy:
        array = data if isinstance(data, da.Array) else da.from_zarr(data)
    else:
        array = np.asarray(data[...])
    _refuse_bad_values(path, array)
    return Roi(array, tuple(channels), path, tuple(labels), tuple(use), pixel_size)


def _refuse_bad_values(path: Path, array) -> None:
    """Refuse NaN / Inf and negative pixels, counted in one pass.

    Pixels are counts (ions, photons): a negative value is an offset or a signed
    conversion, and every fraction of signal removed would then be meaningless. The
    user subtracts or clips it knowingly before cleaning.
    """
    kind = np.dtype(array.dtype).kind
    if kind not in "fi":
        return
    if isinstance(array, np.ndarray):
        finite = np.isfinite(array) if kind == "f" else True
        bad = int(array.size - np.count_nonzero(finite)) if kind == "f" else 0
        negative = int(np.count_nonzero(array < 0))
    else:
        import dask.array as da

        bad_lazy = (~da.isfinite(array)).sum() if kind == "f" else 0
        bad, negative = (int(v) for v in da.compute(bad_lazy, (array < 0).sum()))
    if bad:
        raise InputError(path, f"{bad} pixel(s) are NaN or Inf; refusing to clean non-finite data")
    if negative:
        total = int(np.prod(array.shape))
        raise InputError(path, f"{negative} of {total} pixels ({100 * negative / total:.3g} %) are "
                         "negative; pixel values are counts and cannot be below 0 (subtract the "
                         "offset or clip to 0 first)")


def _open_tiff(path: Path, *, has_panel: bool):
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
                raise InputError(path, f"file is truncated or damaged ({_short(exc)})") from None
            raise InputError(path, f"not a readable TIFF file ({_short(exc)})") from None
    try:
        if series is None:
            raise InputError(path, "TIFF holds no image")
        if warnings.damage:
            raise InputError(path, f"file is truncated or damaged ({_short(warnings.damage[0])})")
        _refuse_truncated(path, series, size)
        axes = series.axes.upper()
        shape = tuple(series.shape)
        keep = _squeeze_axes(path, axes, shape, plain=not tif.is_ome)
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
            data = _one_channel(data)
        if channels is None and not has_panel:
            raise InputError(path, "OME-XML names no channels; give its panel (--panel panel.csv)")
        return data, channels, pixel_size
    except InputError:
        tif.close()
        raise
    except Exception as exc:  # tifffile raises many types on damaged files
        tif.close()
        raise InputError(path, f"cannot read TIFF ({_short(exc)})") from None


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


def _one_channel(data):
    """A (Y, X) array (zarr or dask) as a lazy (1, Y, X) stack."""
    import dask.array as da

    lazy = data if is_dask(data) else da.from_zarr(data)
    return lazy[None]


def _has_tiff_header(path: Path) -> bool:
    """True when the file starts like a TIFF or BigTIFF (TIFF 6.0 spec, section 2)."""
    with open(path, "rb") as fh:
        head = fh.read(4)
    return head in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")


def _short(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or exc.__class__.__name__
    return text if len(text) <= 120 else text[:117] + "..."


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


def _squeeze_axes(path: Path, axes: str, shape: tuple[int, ...], *, plain: bool = False) -> tuple[int, ...]:
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


def _open_zarr(path: Path):
    """Array, channel labels and pixel size of an OME-Zarr image (NGFF 0.4 or 0.5)."""
    import zarr

    try:
        group = zarr.open_group(path, mode="r")
    except Exception as exc:
        raise InputError(path, f"not a readable OME-Zarr folder ({_short(exc)})") from None
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
    keep = _squeeze_axes(path, "".join(a.upper() for a in axes), tuple(array.shape))
    data = array
    if keep != tuple(range(array.ndim)):
        import dask.array as da

        data = da.from_zarr(array).reshape(tuple(array.shape[i] for i in keep))
    if len(keep) == 2:  # one channel: a C x Y x X stack with C = 1
        data = _one_channel(data)
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


# --------------------------------------------------------------------------- writing


def write_stack(path, data, channels, *, pixel_size=None, settings=None) -> Path:
    """Write a stack in the format of ``settings`` (an :class:`OutputSettings`).

    ``data`` is a numpy array, a dask array (computed chunk by chunk) or any array store
    that can be sliced ``data[c, y0:y1, x0:x1]`` (a zarr array, a staged stack), read
    band by band. Returns the final path.
    """
    settings = settings or OutputSettings()
    writer = write_ome_zarr if settings.format == "ome-zarr" else write_ome_tiff
    return writer(path, data, channels, pixel_size=pixel_size, settings=settings)


def output_name(stem: str, settings=None) -> str:
    """File name of a washed stack for an ROI stem.

    Examples
    --------
    >>> output_name("roi_01")
    'roi_01.ome.tiff'
    """
    settings = settings or OutputSettings()
    return stem + (".ome.zarr" if settings.format == "ome-zarr" else ".ome.tiff")


def write_ome_tiff(path, data, channels, *, pixel_size=None, settings=None) -> Path:
    """Write a C x Y x X stack as a tiled, compressed OME-TIFF, atomically.

    A dask array is computed chunk by chunk: small stacks in memory, big ones through a
    temporary zarr store beside the output so memory stays bounded by chunks. An array
    store (zarr array, staged stack) is read band by band.

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
    _check_stack_shape(path, data, channels)
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
        spill_dir = None
        try:
            kwargs = {"shape": tuple(data.shape), "dtype": np.dtype(data.dtype)}
            if is_dask(data) and _nbytes(data) > IN_MEMORY_WRITE_BYTES:
                spill_dir = temporary_path(path, "spill")
                spill_dir.mkdir()
                content = _tiles(_spill_to_zarr(data, spill_dir), tile)
            elif is_dask(data) or isinstance(data, np.ndarray):
                content, kwargs = np.asarray(data), {}
            else:  # an array store: read band by band
                content = _tiles(data, tile)
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
        finally:
            if spill_dir is not None:
                remove_path(spill_dir)

    return write_atomic(path, build)




def _round_up16(n: int) -> int:
    return int(-(-n // 16) * 16)


def _nbytes(data) -> int:
    return int(np.prod(data.shape)) * np.dtype(data.dtype).itemsize


def _check_stack_shape(path: Path, data, channels: Sequence[str]) -> None:
    if data.ndim != 3:
        raise InputError(path, f"expected a C x Y x X stack to write, got {data.ndim}-D")
    if len(channels) != data.shape[0]:
        raise InputError(path, f"{len(channels)} channel names for {data.shape[0]} channels")


def _spill_to_zarr(data, folder: Path):
    """Compute a dask stack once into an uncompressed local zarr array.

    The zarr chunks are one channel by the dask chunk's Y x X, so every dask block
    writes whole zarr chunks and no two blocks touch the same chunk (no lock needed).
    """
    import zarr

    cy, cx = data.chunksize[1], data.chunksize[2]
    data = data.rechunk({1: cy, 2: cx})
    array = zarr.create_array(
        store=str(folder / "stack.zarr"),
        shape=data.shape,
        dtype=data.dtype,
        chunks=(1, cy, cx),
        compressors=None,
        zarr_format=3,
    )
    _store(data, array)
    return array


def _store(data, array) -> None:
    """Store a dask array into a zarr array (chunks aligned: no lock)."""
    import dask.array as da

    da.store(data, array, lock=False)


def _tiles(array, tile: int) -> Iterator[np.ndarray]:
    """Tiles in TIFF order: channel by channel, then row-major; read one band of rows at a time."""
    n_c, n_y, n_x = array.shape
    for c in range(n_c):
        for y in range(0, n_y, tile):
            band = np.asarray(array[c, y : y + tile, 0:n_x])
            for x in range(0, n_x, tile):
                yield np.ascontiguousarray(band[:, x : x + tile])


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
    _check_stack_shape(path, data, channels)
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


# --------------------------------------------------------------------------- hashing


def sha256_path(path: str | Path, *, chunk: int = 2**20) -> str:
    """SHA-256 of a file, or of a folder (sorted relative paths and file contents).

    Examples
    --------
    >>> import tempfile, pathlib, hashlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> sha256_path(p) == hashlib.sha256(b"abc").hexdigest()
    True
    """
    path = Path(path)
    digest = hashlib.sha256()
    if path.is_dir():
        for item in sorted(p for p in path.rglob("*") if p.is_file()):
            digest.update(item.relative_to(path).as_posix().encode() + b"\0")
            _hash_file_into(digest, item, chunk)
        return digest.hexdigest()
    _hash_file_into(digest, path, chunk)
    return digest.hexdigest()


def _hash_file_into(digest, path: Path, chunk: int) -> None:
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            digest.update(block)


def canonical_json(value) -> str:
    """JSON with sorted keys and no spaces: the text hashed for provenance."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True)

