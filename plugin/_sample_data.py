"""npe2 sample data: ROIs of the demo cohort (``example_stack/`` in the source tree)."""

from __future__ import annotations

import os
from pathlib import Path

#: Environment variable naming another demo folder (holding ``cohort/`` and ``stains.csv``).
DEMO_ENV = "PLEXWASH_DEMO_DIR"


def demo_dir() -> Path:
    """The demo folder: ``$PLEXWASH_DEMO_DIR`` if set, else ``example_stack/`` of the source tree."""
    from plexwash.qc.errors import InputError

    folder = Path(os.environ.get(DEMO_ENV) or Path(__file__).resolve().parents[1] / "example_stack")
    if not (folder / "cohort").is_dir():
        raise InputError(folder, "demo cohort not found (make it with: python example_stack/generate.py, "
                                 f"or point {DEMO_ENV} at a folder holding cohort/ and stains.csv)")
    return folder


def demo_cohort() -> Path:
    """The demo cohort folder."""
    return demo_dir() / "cohort"


def _demo_roi(index: int) -> list[tuple]:
    from plexwash.qc.io import list_cohort

    from ._reader import read_roi_layers

    rois = list_cohort(demo_cohort())
    return read_roi_layers(rois[min(index, len(rois) - 1)])


def demo_first_roi() -> list[tuple]:
    """The demo cohort's first ROI, one layer per channel labelled from its stains."""
    return _demo_roi(0)


def demo_second_roi() -> list[tuple]:
    """The demo cohort's second ROI (it carries line drop-out rows)."""
    return _demo_roi(1)
