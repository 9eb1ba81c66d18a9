"""The cleaning steps: hot pixels, compensation, speckle, declared once in :mod:`.registry`.

Each step is a pure function ``array in -> array out (+ removed map, + stats)`` on a
(C, Y, X) stack, numpy or dask; :mod:`.lifting` lifts the plane kernels to stacks and to
dask in one place.
"""

from .compensation import CompensationSettings
from .hot_pixels import HotPixelSettings, hot_pixels_stack, remove_hot_pixels
from .lifting import StepResult
from .registry import STEP_NAMES, STEPS, Step, per_channel_steps, step
from .speckle import (
    BackgroundEstimate,
    SpeckleSettings,
    estimate_background,
    remove_speckle,
    speckle_stack,
)

__all__ = [
    "STEPS",
    "STEP_NAMES",
    "BackgroundEstimate",
    "CompensationSettings",
    "HotPixelSettings",
    "SpeckleSettings",
    "Step",
    "StepResult",
    "estimate_background",
    "hot_pixels_stack",
    "per_channel_steps",
    "remove_hot_pixels",
    "remove_speckle",
    "speckle_stack",
    "step",
]
