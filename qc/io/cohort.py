"""The files of a cohort: which names are ROIs, an ROI's stem, and the names and format of outputs."""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Iterable
from pathlib import Path, PurePosixPath

from ..errors import InputError
from ..settings import setting

TIFF_SUFFIXES = (".ome.tiff", ".ome.tif", ".tiff", ".tif")
ZARR_SUFFIXES = (".ome.zarr", ".zarr")
#: A run folder holds this file (the ledger); a cohort search never enters one.
RUN_LEDGER = "ledger.jsonl"


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
    tissue_mask: bool = setting(False, "also write <roi>.mask.ome.tiff beside each washed stack: the tissue mask"
                                " the wash used (uint8, 1 = tissue)")
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


def list_cohort(folder: str | Path, *, skip: Iterable[str | Path] = ()) -> list[Path]:
    """ROI files and folders of a cohort, at any depth, sorted by their ROI id.

    Subfolders (slides) are searched to any depth. Hidden folders (``.name``), run
    folders (they hold a ``ledger.jsonl``), ROI folders (``.ome.zarr``: an ROI, not a
    slide) and the folders in ``skip`` (e.g. a run folder inside the cohort) are not
    descended; a folder reached twice through symbolic links (a loop) is read once.

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
    skipped = {os.path.realpath(p) for p in skip}
    rois: list[Path] = []
    seen: set[tuple[int, int]] = set()
    pending = [folder]
    while pending:
        current = pending.pop()
        try:
            info = current.stat()
            entries = sorted(current.iterdir())
        except OSError:
            continue  # unreadable or a dangling link: nothing of it can be an ROI
        if (info.st_dev, info.st_ino) in seen:
            continue  # reached again through a link: a loop or a second way in
        seen.add((info.st_dev, info.st_ino))
        for entry in entries:
            if is_roi_path(entry) and (entry.is_file() or entry.is_dir()):
                rois.append(entry)
            elif entry.is_dir() and not _skip_folder(entry, skipped):
                pending.append(entry)
    if not rois:
        raise InputError(folder, "no ROI found (expected .ome.tiff, .tiff or .ome.zarr files, "
                         "in the folder or its subfolders)")
    return sorted(rois, key=lambda p: roi_id(p, folder))


def _skip_folder(path: Path, skipped: set[str]) -> bool:
    """Folders a cohort search does not enter: hidden ones, run folders, those asked for."""
    return (path.name.startswith(".") or (path / RUN_LEDGER).is_file()
            or os.path.realpath(path) in skipped)


def roi_id(path: str | Path, cohort: str | Path) -> str:
    """An ROI's id: its path relative to the cohort folder, POSIX separators, no image suffix.

    A flat cohort's ids are the plain stems (as before nested cohorts existed, so earlier
    ledgers resume); ROIs in subfolders keep their folders, so equal names in different
    slides stay distinct.

    Examples
    --------
    >>> roi_id("cohort/slide03/r07.ome.tiff", "cohort")
    'slide03/r07'
    >>> roi_id("cohort/roi_01.ome.tiff", "cohort")
    'roi_01'
    """
    path, cohort = Path(path), Path(cohort)
    try:
        relative = path.relative_to(cohort)
    except ValueError:
        relative = Path(os.path.relpath(path, cohort))
    return PurePosixPath(*relative.parent.parts, roi_stem(path)).as_posix()


def output_name(stem: str, settings=None) -> str:
    """File name of a washed stack for an ROI id (relative, POSIX separators).

    Examples
    --------
    >>> output_name("roi_01")
    'roi_01.ome.tiff'
    >>> output_name("slide03/r07")
    'slide03/r07.ome.tiff'
    """
    settings = settings or OutputSettings()
    return stem + (".ome.zarr" if settings.format == "ome-zarr" else ".ome.tiff")
