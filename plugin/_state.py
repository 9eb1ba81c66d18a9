"""What the five dock widgets of one viewer share: the cohort, the current ROI, the recipe.

One :class:`StudioState` per viewer. Widgets read it and listen to its signals; only the
widget that owns a piece of state changes it (Cohort: cohort and ROI; Spillover: the
matrix; Speckle: the recipe's cleaning settings; Run: the run folder). Signals are
emitted on the GUI thread.
"""

from __future__ import annotations

import weakref
from pathlib import Path

import numpy as np
from psygnal import Signal

_STATES: dict[int, StudioState] = {}


class StudioState:
    """Shared state of the studio on one viewer.

    Attributes
    ----------
    cohort : Path or None
        The cohort folder.
    rois : list of Path
        Its ROIs, sorted.
    roi : plexwash.qc.Roi or None
        The ROI on the canvas.
    recipe : plexwash.qc.Recipe
        The settings being tuned (defaults until loaded or changed).
    spillover : SpilloverMatrix or None
        The matrix loaded or estimated in the Spillover widget.
    channel : str or None
        The channel being tuned (acquisition name).
    run_dir : Path or None
        Output folder of the last run (its ``quality.csv`` feeds the Cohort flags).
    quality : dict
        ROI id (:meth:`roi_key`) -> quality rows (raw stage) measured in the studio.
    pending_quality : set of str
        ROI ids whose raw quality a background measurement will still deliver.
    run_quality : dict
        ROI id -> stage -> rows of the run's ``quality.csv`` (a run folder chosen or opened).
    view : str
        What the canvas shows (the Cohort widget's view buttons): ``single``, ``grid``,
        ``overlay`` or ``preview``.
    """

    cohort_changed = Signal(object)
    roi_changed = Signal(object)
    recipe_changed = Signal(object)
    spillover_changed = Signal(object)
    channel_changed = Signal(object)
    run_finished = Signal(object)
    quality_changed = Signal(str)
    view_requested = Signal(str)
    preview_shown = Signal()
    run_quality_changed = Signal(object)

    def __init__(self):
        from plexwash.qc import default_recipe

        self.cohort: Path | None = None
        self.rois: list[Path] = []
        self.roi = None
        self.recipe = default_recipe()
        self.spillover = None
        self.channel: str | None = None
        self.run_dir: Path | None = None
        self.quality: dict[str, list[dict]] = {}
        self.pending_quality: set[str] = set()
        self.run_quality: dict[str, dict[str, list[dict]]] = {}
        self.view = "single"
        #: True when ``launch_studio`` made the window (the studio owns the process): long-lived
        #: objects may then be moved out of the garbage collector's sight (``gc.freeze``).
        self.owns_process = False
        self._planes: dict[int, np.ndarray] = {}

    # ------------------------------------------------------------------ inputs

    def inputs(self, *extra) -> list[Path]:
        """Every file the studio reads data from: the cohort's ROIs (and its stain sheet), the
        recipe's spillover matrix and ``extra`` (files a widget loaded), with the files
        reached through them (the engine's :func:`plexwash.qc.files.reached_inputs`). A save
        button's output may be none of these (:func:`plexwash.qc.files.check_output`). The
        recipe being tuned is not among them: saving it back where it came from is allowed
        when plexwash wrote that file."""
        from plexwash.qc.files import reached_inputs

        named = [*self.rois, self.recipe.spillover_path(), *self.recipe.batch_spillover_paths().values(), *extra]
        if self.cohort is not None:
            named.append(self.cohort / "stains.csv")
        return reached_inputs(p for p in named if p is not None)

    # ------------------------------------------------------------------ setters

    def set_cohort(self, folder: Path, rois: list[Path]) -> None:
        self.cohort = Path(folder)
        self.rois = list(rois)
        self.quality = {}
        self.pending_quality = set()
        self.cohort_changed.emit(self.cohort)

    def set_roi(self, roi) -> None:
        self.roi = roi
        self._planes = {}
        if roi is not None and (self.channel is None or self.channel not in roi.channels):
            self.channel = roi.channels[0]
        self.roi_changed.emit(roi)

    def set_recipe(self, recipe) -> None:
        self.recipe = recipe
        self.recipe_changed.emit(recipe)

    def set_spillover(self, matrix) -> None:
        self.spillover = matrix
        self.spillover_changed.emit(matrix)

    def set_channel(self, channel: str) -> None:
        if channel != self.channel:
            self.channel = channel
            self.channel_changed.emit(channel)

    def request_view(self, view: str) -> None:
        """Ask the Cohort widget to show another view (e.g. the Speckle widget: ``preview``)."""
        if view != self.view:
            self.view_requested.emit(view)

    def roi_key(self, roi) -> str:
        """The id of an ROI (or of an ROI's path), as a run's ``quality.csv`` names it: its path
        relative to the cohort folder, or to the run folder for a washed ROI of a run
        (:func:`plexwash.qc.io.roi_id`). Two ROIs of the same file name in different slide
        folders get different ids; an ROI outside both folders keeps its file name."""
        from plexwash.qc.io import roi_id, roi_stem

        path = getattr(roi, "path", roi)
        if path is None:
            return str(roi.name)
        path = Path(path).resolve()
        folders = sorted({Path(f).resolve() for f in (self.cohort, self.run_dir) if f is not None},
                         key=lambda f: len(f.parts), reverse=True)  # a run folder inside the cohort first
        for folder in folders:
            if path.is_relative_to(folder):
                return roi_id(path, folder)
        return roi_stem(path)

    def set_quality(self, roi_name: str, rows: list[dict]) -> None:
        self.quality[roi_name] = rows
        self.pending_quality.discard(roi_name)
        self.quality_changed.emit(roi_name)

    # ------------------------------------------------------------------ pixels

    def plane(self, channel: str) -> np.ndarray:
        """One channel of the current ROI as float32 numpy (cached until the ROI changes)."""
        if self.roi is None:
            raise LookupError("no ROI loaded")
        index = self.roi.channel_index(channel)
        if index not in self._planes:
            self._planes[index] = np.ascontiguousarray(np.asarray(self.roi.data[index]), dtype=np.float32)
        return self._planes[index]

    def label(self, channel: str) -> str:
        """Marker name of a channel of the current ROI."""
        return self.roi.labels[self.roi.channel_index(channel)]


def studio_state(viewer) -> StudioState:
    """The :class:`StudioState` of a viewer (made on first use, dropped with the viewer).

    napari hands each plugin widget its own proxy of the viewer; the state belongs to
    the viewer behind the proxies, so all widgets of one window share it.
    """
    viewer = getattr(viewer, "__wrapped__", viewer)
    key = id(viewer)
    entry = _STATES.get(key)
    if entry is not None and entry._viewer() is viewer:
        return entry
    state = StudioState()
    state._viewer = weakref.ref(viewer)
    _STATES[key] = state
    weakref.finalize(viewer, _STATES.pop, key, None)
    return state
