"""plexwash engine: read, clean and measure multiplexed tissue ROIs (no Qt, no napari).

Research software: keep raw data; cleaned images are not for clinical diagnosis.
"""

import sys as _sys
import types as _types

from ._lazy import lazy_names
from ._version import __version__

# Every public name is imported on first use (PEP 562), so that ``import plexwash.qc`` and
# the command line start without loading numpy, scipy, numba and dask up front; each name
# below still resolves to the same object as before (``plexwash.qc.wash`` etc.).
_WHERE = {
    "InputError": ".errors",
    "OutputSettings": ".io",
    "Roi": ".io",
    "StainSheet": ".io",
    "read_roi": ".io",
    "read_stains": ".io",
    "write_ome_tiff": ".io",
    "write_ome_zarr": ".io",
    "QualitySettings": ".quality",
    "add_outlier_flags": ".quality",
    "cohort_outliers": ".quality",
    "measure_channel": ".quality",
    "measure_stack": ".quality",
    "modified_z_scores": ".quality",
    "quality_rows": ".quality",
    "Recipe": ".recipe",
    "default_recipe": ".recipe",
    "load_recipe": ".recipe",
    "write_recipe": ".recipe",
    "SpilloverMatrix": ".spillover",
    "compensate": ".spillover",
    "estimate_from_controls": ".spillover",
    "estimate_from_tissue": ".spillover",
    "read_spillover": ".spillover",
    "write_spillover": ".spillover",
    "CompensationSettings": ".steps.compensation",
    "HotPixelSettings": ".steps.hot_pixels",
    "remove_hot_pixels": ".steps.hot_pixels",
    "SpeckleSettings": ".steps.speckle",
    "remove_speckle": ".steps.speckle",
    "Washed": ".wash",
    "wash": ".wash",
    "wash_to_file": ".wash",
}


__getattr__, __dir__ = lazy_names(__name__, globals(), _WHERE)


class _Package(_types.ModuleType):
    """This package's module type: ``wash`` stays the function once its submodule loads.

    The import system binds a loaded submodule as an attribute of its package; the
    submodule ``wash`` shares its name with the function it defines, which is what
    ``plexwash.qc.wash`` has always been (the module stays ``sys.modules["plexwash.qc.wash"]``).
    """

    def __setattr__(self, name, value):
        if name in _WHERE and isinstance(value, _types.ModuleType) and hasattr(value, name):
            value = getattr(value, name)
        super().__setattr__(name, value)


_sys.modules[__name__].__class__ = _Package


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
