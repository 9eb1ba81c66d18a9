"""THE list of cleaning steps: each declared once, in the order a wash runs them.

Everything that runs or describes the steps iterates over :data:`STEPS`: the in-memory
wash (:mod:`plexwash.qc.wash`), the staged big-stack wash (:mod:`plexwash.qc.staging`),
the recipe schema and its commented default (:mod:`plexwash.qc.recipe`), the report's
per-step columns and the studio's settings forms.

Data flow: read -> hot_pixels -> compensation -> speckle -> write.

A step's *scope* says what one piece of its work needs:

``"plane"``
    one channel's whole plane (hot pixels, speckle): channels are independent, a staged
    wash runs one task per channel, a dask stack is lifted with ``map_overlap`` and the
    step's ``depth``.
``"pixels"``
    every used channel of a band of rows (compensation): a staged wash runs one task per
    band; a wash of a channel subset still runs it on all used channels.

Adding a step: write its module under ``qc/steps/`` (settings dataclass declared with
:func:`plexwash.qc.settings.setting`, a stack function ``(stack, settings per channel,
matrix) -> StepResult``), add one :class:`Step` below, and test it.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

from .compensation import CompensationSettings, compensation_stack
from .hot_pixels import HotPixelSettings, hot_pixels_stack
from .speckle import SpeckleSettings, speckle_stack

__all__ = ["STEPS", "STEP_NAMES", "Step", "context_wanted", "per_channel_steps", "step"]


def _plane_stack(function: Callable, *, uses_background: bool = False) -> Callable:
    """A plane step's stack function with the registry's signature (the matrix unused)."""

    def run(stack, settings, matrix=None, *, parallel: bool = True, background=None, spilled=None):
        if uses_background:
            return function(stack, list(settings), context=background, spilled=spilled)
        return function(stack, list(settings))

    run.__doc__ = function.__doc__
    return run


@dataclasses.dataclass(frozen=True)
class Step:
    """One cleaning step, as the wash, the staged wash, the recipe and the studio see it.

    Attributes
    ----------
    name : str
        Recipe section and key of the step's removed map and stats (``hot_pixels``).
    label : str
        Short words for tables and forms (``hot pixels``).
    title : str
        One line for the commented recipe.
    settings : type
        Frozen settings dataclass (fields declared with ``setting``, ``enabled`` first).
    per_channel : bool
        Whether ``[<name>.channels.<channel>]`` overrides are allowed.
    scope : str
        ``"plane"`` (one channel at a time) or ``"pixels"`` (all used channels of a band).
    run : callable
        ``run(stack, settings, matrix, *, parallel=True) -> StepResult`` on a (C, Y, X)
        float32 stack (numpy or dask) of the used channels it works on, ``settings`` one
        per channel; stats one dict per channel. ``parallel=False``: a task that already
        holds its thread (staged passes).
    needs_matrix : bool
        The step runs only with a spillover matrix (a note says so otherwise).
    plane_copies : float
        Plane-sized float32 arrays one plane task holds (staged passes bound the planes
        in flight by it). Unused for ``"pixels"`` steps.
    stats : tuple of str
        Keys of the step's own per-channel numbers (besides ``channel``, ``ran`` and
        ``removed_fraction``, which every step has).
    uses_background : bool
        ``run`` takes ``spilled=`` (what compensation removed from the channels it works
        on, None when compensation did not run) and ``background=``, the ROI's background context
        (:func:`plexwash.qc.background_context.roi_background`), which the wash computes once per
        ROI from the raw used channels, before the first step, whenever a running step
        uses it (:func:`context_wanted`).
    """

    name: str
    label: str
    title: str
    settings: type
    per_channel: bool
    scope: str
    run: Callable
    needs_matrix: bool = False
    plane_copies: float = 3.0
    stats: tuple[str, ...] = ()
    uses_background: bool = False

    def runs(self, settings, matrix) -> bool:
        """Whether the step does anything with these per-channel settings (and matrix)."""
        if self.needs_matrix and matrix is None:
            return False
        return any(s.enabled for s in settings)

    @property
    def skipped_note(self) -> str:
        return f"{self.name} skipped: no spillover matrix given" if self.needs_matrix else ""


STEPS: tuple[Step, ...] = (
    Step(
        name="hot_pixels",
        label="hot pixels",
        title="Hot pixels: single-pixel spikes, detected then restored from their neighbours.",
        settings=HotPixelSettings,
        per_channel=True,
        scope="plane",
        run=_plane_stack(hot_pixels_stack),
        plane_copies=3.0,  # plane, cleaned, removed
        stats=("enabled", "n_pixels"),
    ),
    Step(
        name="compensation",
        label="compensation",
        title="Spillover compensation: exact per-pixel NNLS with the spillover matrix.",
        settings=CompensationSettings,
        per_channel=False,
        scope="pixels",
        run=compensation_stack,
        needs_matrix=True,
        stats=("method",),
    ),
    Step(
        name="speckle",
        label="speckle",
        title="Speckle: isolated background counts removed by a local-density test.",
        settings=SpeckleSettings,
        per_channel=True,
        scope="plane",
        run=_plane_stack(speckle_stack, uses_background=True),
        plane_copies=4.0,  # plane, cleaned, removed, the uint16 window counts and the zone map
        stats=("enabled", "rate", "level", "count_threshold", "value_threshold", "level_glass", "n_removed"),
        uses_background=True,
    ),
)

#: Step names in wash order.
STEP_NAMES: tuple[str, ...] = tuple(s.name for s in STEPS)


def step(name: str) -> Step:
    """The registered step called ``name``."""
    for candidate in STEPS:
        if candidate.name == name:
            return candidate
    raise KeyError(f"no cleaning step {name!r}; known: {', '.join(STEP_NAMES)}")


def per_channel_steps() -> tuple[Step, ...]:
    """The steps whose settings may differ channel by channel (the studio's forms)."""
    return tuple(s for s in STEPS if s.per_channel)


def context_wanted(running) -> bool:
    """Whether a wash running ``running`` (pairs of step and its per-channel settings) needs
    the ROI's background context: a step uses it and one of its enabled channels asks for
    local rates."""
    return any(step.uses_background and any(s.enabled and s.local_rates for s in settings)
               for step, settings in running)
