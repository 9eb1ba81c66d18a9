"""The main job on the demo cohort: estimate spillover from its controls, run, report."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .cohort import RunSummary, run_cohort

#: The demo data of a source checkout: ``example_stack/`` beside the ``qc`` folder.
DEMO_STACK = Path(__file__).resolve().parents[2] / "example_stack"


def run_demo(out_dir="plexwash-demo", *, stack=None, workers=None, progress=True,
             staging_dir=None) -> RunSummary:
    """The main job on the demo cohort: estimate spillover from its controls, run, report.

    Parameters
    ----------
    out_dir : str or Path
        The run folder (default ``plexwash-demo`` in the current folder).
    stack : str or Path, optional
        The demo folder (``cohort/``, ``controls/controls.csv``, ``stains.csv``); default
        ``example_stack/`` of the source checkout.
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
        When the demo folder is missing (an installed wheel has no ``example_stack``).
    """
    from ..spillover import estimate_from_controls

    stack = Path(stack) if stack is not None else DEMO_STACK
    controls = stack / "controls" / "controls.csv"
    for needed in (stack / "cohort", controls, stack / "stains.csv"):
        if not needed.exists():
            raise InputError(needed, "demo data not found (it ships with the source checkout, "
                             "example_stack/)")
    matrix = estimate_from_controls(controls, stains=stack / "stains.csv")
    return run_cohort(stack / "cohort", out_dir, spillover=matrix, stains=stack / "stains.csv",
                      workers=workers, progress=progress, staging_dir=staging_dir)
