"""Reading ROIs (OME-TIFF, TIFF + stains, OME-Zarr) and writing washed stacks atomically.

The modules, by topic:

* :mod:`.roi`: the :class:`Roi`, :func:`read_roi` (any format) and :func:`write_stack`;
* :mod:`.tiff`: opening an (OME-)TIFF with its damage checks, the tiled OME-TIFF writer;
* :mod:`.zarr`: opening an OME-Zarr with its damage check, the OME-Zarr writer;
* :mod:`.stains`: ``stains.csv`` and the small-CSV helpers;
* :mod:`.cohort`: which files are ROIs (at any depth), their ids, the output names and format;
* :mod:`.samples`: ``samples.csv``, the batch (and further columns) of each ROI;
* :mod:`.checks`: shape helpers shared by the readers and writers;
* :mod:`.hashing`: SHA-256 of files and folders, canonical JSON.

The tunable thresholds stay in their modules (``roi.LAZY_BYTES``,
``tiff.IN_MEMORY_WRITE_BYTES``): set them there, not here.
"""

from .cohort import (
    TIFF_SUFFIXES,
    ZARR_SUFFIXES,
    OutputSettings,
    is_roi_path,
    list_cohort,
    output_name,
    roi_id,
    roi_stem,
)
from .hashing import canonical_json, file_stamp, sha256_path
from .roi import SUPPORTED_DTYPES, Roi, read_levels, read_roi, write_stack
from .samples import SampleSheet, find_samples, match_samples, read_samples
from .stains import StainSheet, read_csv_cells, read_stains, refuse_duplicates, stains_text
from .tiff import write_ome_tiff
from .zarr import ngff_metadata, write_ome_zarr

__all__ = [
    "SUPPORTED_DTYPES",
    "TIFF_SUFFIXES",
    "ZARR_SUFFIXES",
    "OutputSettings",
    "SampleSheet",
    "StainSheet",
    "Roi",
    "canonical_json",
    "file_stamp",
    "find_samples",
    "is_roi_path",
    "list_cohort",
    "match_samples",
    "ngff_metadata",
    "output_name",
    "read_csv_cells",
    "read_levels",
    "read_stains",
    "stains_text",
    "read_roi",
    "read_samples",
    "refuse_duplicates",
    "roi_id",
    "roi_stem",
    "sha256_path",
    "write_ome_tiff",
    "write_ome_zarr",
    "write_stack",
]
