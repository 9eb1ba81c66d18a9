"""The main job on the demo cohort: estimate spillover from its controls, run, report."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .cohort import RunSummary, run_cohort


def demo_folder() -> Path:
    """The demo data: ``example_stack/`` of a source checkout, else the copy in the wheel.

    The wheel ships the same files as package data of ``plexwash.example_stack``.
    """
    checkout = Path(__file__).resolve().parents[2] / "example_stack"
    if (checkout / "cohort").is_dir():
        return checkout
    from importlib.resources import files

    return Path(str(files("plexwash.example_stack")))


#: The demo data (see :func:`demo_folder`).
DEMO_STACK = demo_folder()


def run_demo(out_dir="plexwash-demo", *, stack=None, workers=None, progress=True,
             staging_dir=None) -> RunSummary:
    """The main job on the demo cohort: estimate spillover from its controls, run, report.

    Parameters
    ----------
    out_dir : str or Path
        The run folder (default ``plexwash-demo`` in the current folder).
    stack : str or Path, optional
        The demo folder (``cohort/``, ``controls/controls.csv``, ``stains.csv``); default
        :data:`DEMO_STACK` (the source checkout's ``example_stack/``, else the wheel's copy).
    workers : int, optional
        As in :func:`run_cohort`.
    progress : bool
        As in :func:`run_cohort`.
    staging_dir : str or Path, optional
        As in :func:`run_cohort`.

    Returns
    -------
    RunSummary

    Raises
    ------
    InputError
        When the demo folder is incomplete.
    """
    from ..spillover import estimate_from_controls

    stack = Path(stack) if stack is not None else DEMO_STACK
    controls = stack / "controls" / "controls.csv"
    for needed in (stack / "cohort", controls, stack / "stains.csv"):
        if not needed.exists():
            raise InputError(needed, "demo data not found (example_stack/ of the source "
                             "checkout, or plexwash.example_stack in the wheel)")
    matrix = estimate_from_controls(controls, stains=stack / "stains.csv")
    return run_cohort(stack / "cohort", out_dir, spillover=matrix, stains=stack / "stains.csv",
                      workers=workers, progress=progress, staging_dir=staging_dir)
