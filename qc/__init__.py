"""plexwash engine: read, clean and measure multiplexed tissue ROIs (no Qt, no napari).

Research software: keep raw data; cleaned images are not for clinical diagnosis.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("plexwash")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

from .errors import InputError
from .io import OutputSettings, Panel, Roi, read_panel, read_roi, write_ome_tiff, write_ome_zarr
from .recipe import Recipe, default_recipe, load_recipe, write_recipe

__all__ = [
    "InputError",
    "OutputSettings",
    "Panel",
    "Recipe",
    "Roi",
    "__version__",
    "default_recipe",
    "load_recipe",
    "read_panel",
    "read_roi",
    "write_ome_tiff",
    "write_ome_zarr",
    "write_recipe",
]
