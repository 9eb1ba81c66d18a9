"""Compensation as a cleaning step: its settings and its entry on a band of pixels.

The numerical work (the spillover matrix, exact per-pixel NNLS) lives in
:mod:`plexwash.qc.spillover`; this module is the step's face in the registry: it
declares ``[compensation]``, finds the matrix a wash uses, and compensates a stack or a
band of rows of all used channels.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from .._arrays import is_dask
from ..settings import setting
from .lifting import StepResult

__all__ = ["CompensationSettings", "compensation_matrix", "compensation_stack"]


@dataclasses.dataclass(frozen=True)
class CompensationSettings:
    """Compensation step settings (recipe section ``[compensation]``)."""

    enabled: bool = setting(True, "compensate spillover (needs a spillover matrix)")
    method: str = setting(
        "nnls",
        "nnls: exact non-negative least squares per pixel; linear: solve, then clip at 0",
        choices=("nnls", "linear"),
    )
    spillover: str = setting("", "spillover matrix CSV (relative to the recipe); empty: none")


def compensation_matrix(names: Sequence[str], settings: CompensationSettings, spillover, *,
                        recipe_matrix: Path | None = None) -> np.ndarray | None:
    """The spillover values over ``names`` (in that order), or None when compensation does not run.

    ``spillover`` (a :class:`~plexwash.qc.spillover.SpilloverMatrix`, a CSV path or None)
    wins over the recipe's ``[compensation] spillover`` file (``recipe_matrix``).
    """
    if not settings.enabled:
        return None
    if spillover is None:
        spillover = recipe_matrix
    if spillover is None:
        return None
    from ..spillover import SpilloverMatrix, align_spillover, read_spillover

    source = spillover if isinstance(spillover, (str, Path)) else "spillover matrix"
    matrix = spillover if isinstance(spillover, SpilloverMatrix) else read_spillover(spillover)
    return align_spillover(matrix, list(names), source=source)


def compensation_stack(stack, settings: Sequence[CompensationSettings], matrix: np.ndarray, *,
                       parallel: bool = True) -> StepResult:
    """Compensate a (C, Y, X) float32 stack or band of all used channels (numpy or dask).

    ``parallel=False`` runs the serial kernel (inside a task that already has its thread);
    both give the same bits. No removed map is made (``removed`` is None): the wash takes
    the difference itself when it keeps one.
    """
    from ..spillover import compensate, compensate_array

    method = settings[0].method
    if is_dask(stack) or parallel:
        out = compensate(stack, matrix, method=method)
    else:
        out = compensate_array(stack, matrix, method=method, parallel=False)
    return StepResult(out, None, [{"method": method} for _ in settings])
