"""One ROI in and out: the :class:`Roi`, :func:`read_roi` (any format, stains applied, pixels
checked) and :func:`write_stack` (the output format of the recipe).

Every problem with an input is raised as :class:`~plexwash.qc.errors.InputError`
naming the file, so the CLI can print one line and exit 2. Inputs are opened read-only;
outputs are written to a temporary name in the destination folder and renamed at the end.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from ..errors import InputError
from .cohort import OutputSettings, roi_stem
from .stains import StainSheet, read_stains, refuse_duplicates
from .tiff import open_tiff, tiff_levels, write_ome_tiff
from .zarr import open_zarr, write_ome_zarr, zarr_levels

#: Stacks bigger than this are read lazily (dask) instead of into memory.
LAZY_BYTES = 256 * 2**20

SUPPORTED_DTYPES = (np.uint8, np.uint16, np.uint32, np.int16, np.int32, np.float32, np.float64)


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
        Readable target names: from the stain sheet; else the marker names a plexwash output
        keeps beside its tags; else the channel names.
    use : tuple of bool
        False for channels the stain sheet marks ``no``: they pass through untouched.
    pixel_size : tuple of float or None
        Physical (y, x) pixel size in micrometres (converted from the file's length
        unit), when the file records it.
    roles : tuple of str
        The stain sheet's segmentation role of each channel (``nuclear``, ``membrane`` or
        ``""``); all empty without a stain sheet.
    """

    data: object
    channels: tuple[str, ...]
    path: Path
    labels: tuple[str, ...] = ()
    use: tuple[bool, ...] = ()
    pixel_size: tuple[float, float] | None = None
    roles: tuple[str, ...] = ()

    def __post_init__(self):
        if not self.roles:
            object.__setattr__(self, "roles", ("",) * len(self.channels))
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
        """Index of a channel by name (or by marker name)."""
        if channel in self.channels:
            return self.channels.index(channel)
        if channel in self.labels:
            return self.labels.index(channel)
        raise InputError(self.path, f"no channel named {channel!r}")


def _apply_stains(path: Path, channels: tuple[str, ...] | None, n_channels: int, stains: StainSheet):
    """Channel names, marker names, wash flags and roles of an ROI given its stain sheet."""
    where = stains.path or path
    if channels is None:  # plain TIFF: the stain sheet names the pages in order
        if len(stains.tags) != n_channels:
            raise InputError(
                where,
                f"stain sheet lists {len(stains.tags)} channels but {path.name} has {n_channels}",
            )
        return stains.tags, stains.markers, stains.wash, stains.roles
    unknown = [c for c in stains.tags if c not in channels]
    absent = [c for c in channels if c not in stains.tags]
    if unknown or absent:
        parts = []
        if unknown:
            parts.append(f"not in {path.name}: {', '.join(unknown)}")
        if absent:
            parts.append(f"missing from the stain sheet: {', '.join(absent)}")
        raise InputError(where, "stain sheet rows do not match the ROI's channels (" + "; ".join(parts) + ")")
    order = [stains.tags.index(c) for c in channels]
    return (channels, tuple(stains.markers[i] for i in order), tuple(stains.wash[i] for i in order),
            tuple(stains.roles[i] for i in order))


def read_roi(path: str | Path, *, stains: str | Path | StainSheet | None = None, lazy: bool | None = None) -> Roi:
    """Read one ROI: OME-TIFF, plain multipage TIFF with a stain sheet, or OME-Zarr (NGFF 0.4/0.5).

    Parameters
    ----------
    path : str or Path
        The image file (``.ome.tiff``, ``.tiff``) or OME-Zarr folder.
    stains : str, Path or StainSheet, optional
        ``stains.csv``: required for a plain TIFF (it names the pages in order); for
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
        more pixels than the file holds; duplicate channel names; stains not matching;
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
    if isinstance(stains, (str, Path)):
        stains = read_stains(stains)
    if not path.exists():
        raise InputError(path, "file not found")
    if path.is_dir():
        data, channels, pixel_size, markers = open_zarr(path)
    else:
        whole = -1 if lazy else LAZY_BYTES if lazy is None else 2**62  # read into memory: at once
        data, channels, pixel_size, markers = open_tiff(path, has_stains=stains is not None, whole_bytes=whole)
    if data.ndim != 3:
        raise InputError(path, f"expected a C x Y x X stack, got {data.ndim}-D data")
    if np.dtype(data.dtype).type not in SUPPORTED_DTYPES:
        raise InputError(path, f"unsupported pixel type {data.dtype}")
    n_channels = int(data.shape[0])
    if channels is not None and len(channels) != n_channels:
        raise InputError(path, f"metadata names {len(channels)} channels but the stack has {n_channels}")
    if stains is not None:
        channels, labels, use, roles = _apply_stains(path, channels, n_channels, stains)
    else:  # a washed stack keeps the marker names beside its tags
        labels, use, roles = (markers or ()), (), ()
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
    return Roi(array, tuple(channels), path, tuple(labels), tuple(use), pixel_size, tuple(roles))


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


def write_stack(path, data, channels, *, pixel_size=None, settings=None, labels=None,
                provenance=None, source_xml=None) -> Path:
    """Write a stack in the format of ``settings`` (an :class:`OutputSettings`), with its pyramid.

    ``data`` is a numpy array, a dask array (computed chunk by chunk) or any array store
    that can be sliced ``data[c, y0:y1, x0:x1]`` (a zarr array, a staged stack), read
    band by band. ``labels`` are the readable marker names (the tags when omitted),
    ``provenance`` a mapping written into the file's metadata, ``source_xml`` the input's
    OME-XML (its instruments and acquisition date carried into an OME-TIFF). Returns the
    final path.
    """
    settings = settings or OutputSettings()
    writer = write_ome_zarr if settings.format == "ome-zarr" else write_ome_tiff
    return writer(path, data, channels, pixel_size=pixel_size, settings=settings, labels=labels,
                  provenance=provenance, source_xml=source_xml)


def read_levels(path: str | Path) -> list:
    """The resolution levels of an ROI file, level 0 first, as lazy dask arrays.

    One entry for a file without a pyramid. :func:`read_roi` reads level 0 only; viewers
    use the whole list (a multiscale image). The arrays keep the file's own axes.
    """
    path = Path(path)
    try:
        return zarr_levels(path) if path.is_dir() else tiff_levels(path)
    except Exception as exc:  # a file read_roi accepted but whose levels cannot be listed
        raise InputError(path, f"cannot list resolution levels ({exc})") from None
