"""The files of a cohort: which names are ROIs, an ROI's stem, and the names and format of outputs."""

from __future__ import annotations

import dataclasses
from pathlib import Path

from ..errors import InputError
from ..settings import setting

TIFF_SUFFIXES = (".ome.tiff", ".ome.tif", ".tiff", ".tif")
ZARR_SUFFIXES = (".ome.zarr", ".zarr")


@dataclasses.dataclass(frozen=True)
class OutputSettings:
    """How washed stacks are written (recipe section ``[output]``)."""

    enabled: bool = setting(True, "write washed stacks (false: measure quality only)")
    format: str = setting("ome-tiff", "file format of washed stacks", choices=("ome-tiff", "ome-zarr"))
    compression: str = setting(
        "zlib",
        "lossless compression (zlib = deflate: read by every OME-TIFF reader; zstd: faster, needs a "
        "reader built with zstd; lzw: widely read, larger files; OME-Zarr writes gzip for zlib and lzw)",
        choices=("zlib", "zstd", "lzw", "none"),
    )
    tile: int = setting(512, "tile / chunk edge in pixels", low=64, high=4096)
    ngff: str = setting("0.5", "OME-Zarr version (0.4: Zarr v2, for readers without Zarr v3)",
                        choices=("0.5", "0.4"))
    transform: str = setting(
        "none", "also write <roi>.arcsinh.ome.tiff: arcsinh(x / cofactor) of the washed stack "
        "(the washed stack itself is never transformed)", choices=("none", "arcsinh"))
    cofactor: float = setting(
        5.0, "arcsinh cofactor (5: the usual one for mass cytometry counts, Bendall et al., "
        "Science 2011); per channel under [output.channels.<tag>]", low=0.0, low_open=True, high=1e9)



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


#: What a run writes beside each washed stack for the next tools (:mod:`plexwash.qc.composite`):
#: segmentation composites and arcsinh copies. Not ROIs: a run folder opened as a cohort skips them.
COMPOSITE_SUFFIX, ARCSINH_SUFFIX = ".composite.ome.tiff", ".arcsinh.ome.tiff"


def is_roi_path(path: str | Path) -> bool:
    """True when the name looks like an ROI plexwash can read (TIFF or Zarr), and is not a
    hand-off file of a run (``<roi>.composite.ome.tiff``, ``<roi>.arcsinh.ome.tiff``)."""
    name = Path(path).name.lower()
    return (not name.startswith(".") and name.endswith(TIFF_SUFFIXES + ZARR_SUFFIXES)
            and not name.endswith((COMPOSITE_SUFFIX, ARCSINH_SUFFIX)))


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


def output_name(stem: str, settings=None) -> str:
    """File name of a washed stack for an ROI stem.

    Examples
    --------
    >>> output_name("roi_01")
    'roi_01.ome.tiff'
    """
    settings = settings or OutputSettings()
    return stem + (".ome.zarr" if settings.format == "ome-zarr" else ".ome.tiff")
