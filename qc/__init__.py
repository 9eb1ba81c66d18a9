"""plexwash engine: read, clean and measure multiplexed tissue ROIs (no Qt, no napari).

Research software: keep raw data; cleaned images are not for clinical diagnosis.
"""

from ._version import __version__
from .errors import InputError
from .io import (
    OutputSettings,
    Roi,
    StainSheet,
    read_roi,
    read_stains,
    write_ome_tiff,
    write_ome_zarr,
)
from .quality import (
    QualitySettings,
    add_outlier_flags,
    cohort_outliers,
    measure_channel,
    measure_stack,
    modified_z_scores,
    quality_rows,
)
from .recipe import Recipe, default_recipe, load_recipe, write_recipe
from .spillover import (
    SpilloverMatrix,
    compensate,
    estimate_from_controls,
    estimate_from_tissue,
    read_spillover,
    write_spillover,
)
from .steps.compensation import CompensationSettings
from .steps.hot_pixels import HotPixelSettings, remove_hot_pixels
from .steps.speckle import SpeckleSettings, remove_speckle
from .wash import Washed, wash, wash_to_file

__all__ = [
    "CompensationSettings",
    "HotPixelSettings",
    "InputError",
    "QualitySettings",
    "SpeckleSettings",
    "SpilloverMatrix",
    "Washed",
    "add_outlier_flags",
    "cohort_outliers",
    "compensate",
    "estimate_from_controls",
    "estimate_from_tissue",
    "measure_channel",
    "measure_stack",
    "modified_z_scores",
    "quality_rows",
    "read_spillover",
    "remove_hot_pixels",
    "remove_speckle",
    "wash",
    "wash_to_file",
    "write_spillover",
    "OutputSettings",
    "StainSheet",
    "Recipe",
    "Roi",
    "__version__",
    "default_recipe",
    "load_recipe",
    "read_stains",
    "read_roi",
    "write_ome_tiff",
    "write_ome_zarr",
    "write_recipe",
]
