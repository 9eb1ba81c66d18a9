"""Speckle dock widget: tune the per-channel cleaning settings with a live preview.

The forms are those of the per-channel steps of the engine's step registry (hot pixels,
speckle). The preview shows the chosen channel three times side by side: raw, washed,
and the removed map (raw - washed), and says what fraction of the channel's signal went.
It is the engine's wash of that one channel (:func:`plexwash.qc.wash` with
``channels=[channel]``), bit for bit the channel of a full wash; the engine's
:class:`~plexwash.qc.wash.WashCache` keeps what a settings change does not touch.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QHBoxLayout,
    QLabel,
    QPushButton,
)

from ._common import PathRow, SettingsForm, StudioWidget
from ._layers import (
    LABELS_LAYER,
    TILE_GAP,
    channel_layer,
    keep_for_good,
    roi_extent,
    studio_layers,
    swap_layer,
)
from ._preview import LatestOnly


def _sections() -> tuple[str, ...]:
    """The per-channel steps this widget edits, in step order (from the engine's registry)."""
    from plexwash.qc.steps.registry import per_channel_steps

    return tuple(step.name for step in per_channel_steps())


@dataclasses.dataclass(frozen=True)
class ChannelPreview:
    """A one-channel wash: what the canvas shows and the numbers beside it.

    Attributes
    ----------
    channel, label : str
        Acquisition name and marker name.
    index : int
        Position of the channel in the ROI.
    washed, removed : numpy.ndarray
        The washed channel and raw - washed (float32).
    fractions : dict
        Step -> fraction of the signal entering that step which it removed.
    total_fraction : float
        Fraction of the channel's raw signal removed by the whole wash.
    removed_limits : (float, float)
        Contrast for the removed map.
    notes : tuple of str
    removed_by_step : dict
        Step -> what that step alone took away from this channel (its removed map).
    """

    channel: str
    label: str
    index: int
    washed: np.ndarray
    removed: np.ndarray
    fractions: dict
    total_fraction: float
    removed_limits: tuple[float, float]
    notes: tuple[str, ...] = ()
    removed_by_step: dict = dataclasses.field(default_factory=dict)


def _removed_limits(removed: np.ndarray) -> tuple[float, float]:
    """0 to the 99th percentile of the removed pixels (a sparse map: most pixels are 0).

    Estimated on every other row and column: a display contrast, kept cheap for live updates.
    """
    sample = removed[::2, ::2] if removed.size > 250_000 else removed
    positive = sample[sample > 0]
    if positive.size == 0:
        positive = removed[removed > 0]
    if positive.size == 0:
        return 0.0, 1.0
    top = float(np.percentile(positive, 99.0))
    return 0.0, top if top > 0 else float(positive.max())


class PreviewEngine:
    """One-channel previews: the engine's wash of that channel, with its cache.

    Holds a :class:`plexwash.qc.wash.WashCache`, so that the ROI's planes are read once
    and a change of a later step's settings reuses the earlier steps (with a spillover
    matrix: hot pixels and compensation of the whole stack). Not thread-safe: the studio
    runs one computation at a time.
    """

    def __init__(self):
        from plexwash.qc.wash import WashCache

        self.cache = WashCache()

    def compute(self, roi, recipe, channel: str, *, spillover=None) -> ChannelPreview:
        """Wash one channel of ``roi`` with ``recipe`` (and ``spillover``) up to the end."""
        from plexwash.qc import wash

        index = roi.channel_index(channel)
        washed = wash(roi, recipe, spillover=spillover, channels=[roi.channels[index]], cache=self.cache)
        raw = self.cache.planes(roi, [index])[index]
        plane = washed.data[0]
        removed = raw - plane
        fractions = {step: row["removed_fraction"] for step, (row,) in washed.stats.items()
                     if row["ran"] and row.get("enabled", True)}
        total = float(raw.sum(dtype=np.float64))
        fraction = float(removed.sum(dtype=np.float64)) / total if total > 0 else 0.0
        notes = list(washed.notes)
        if not roi.use[index]:
            notes.insert(0, "the stain sheet marks this channel wash = no: it passes through")
        by_step = {step: np.asarray(maps[0]) for step, maps in washed.removed.items()}
        return ChannelPreview(washed.channels[0], washed.labels[0], index, plane, removed, fractions, fraction,
                              _removed_limits(removed), tuple(notes), by_step)


def recipe_apply_to_all(recipe, channel: str):
    """A recipe whose global hot-pixel and speckle settings are ``channel``'s, with no overrides.

    Examples
    --------
    >>> from plexwash.qc import default_recipe
    >>> r = default_recipe().with_channel("speckle", "Nd145", radius=4)
    >>> r2 = recipe_apply_to_all(r, "Nd145")
    >>> r2.speckle.radius, dict(r2.overrides)
    (4, {})
    """
    from plexwash.qc.recipe import recipe_from_dict

    data = recipe.to_dict()
    for section in _sections():
        data[section] = dataclasses.asdict(recipe.for_channel(section, channel))
    return recipe_from_dict(data, source=recipe.source)


def own_settings(recipe, section: str, channel: str) -> dict:
    """The settings of ``section`` that ``channel`` overrides: ``{name: global value}``.

    Examples
    --------
    >>> from plexwash.qc import default_recipe
    >>> r = default_recipe().with_channel("speckle", "Nd145", radius=4)
    >>> own_settings(r, "speckle", "Nd145"), own_settings(r, "speckle", "Nd146")
    ({'radius': 2}, {})
    """
    own = recipe.overrides.get(section, {}).get(channel)
    if own is None:
        return {}
    base = getattr(recipe, section)
    return {f.name: getattr(base, f.name) for f in dataclasses.fields(own)
            if getattr(own, f.name) != getattr(base, f.name)}


def recipe_reset_channel(recipe, channel: str):
    """A recipe without ``channel``'s hot-pixel and speckle overrides."""
    from plexwash.qc.recipe import recipe_from_dict

    data = recipe.to_dict()
    for section in _sections():
        overrides = data[section].get("channels", {})
        overrides.pop(channel, None)
        if not overrides:
            data[section].pop("channels", None)
    return recipe_from_dict(data, source=recipe.source)


class SpeckleWidget(StudioWidget):
    """Per-channel hot-pixel and speckle settings, live preview, apply to all, save the recipe."""

    def __init__(self, napari_viewer, parent=None, *, delay_ms: int = 0):
        from plexwash.qc.steps.registry import per_channel_steps

        super().__init__(napari_viewer, parent)
        self.engine = PreviewEngine()
        self.runner = LatestOnly(self._compute, self._deliver, delay_ms=delay_ms, parent=self)
        self.runner.failed.connect(self.fail)
        self.last: ChannelPreview | None = None
        layout = self.layout()

        layout.addWidget(self.caption("Channel"))
        row = QHBoxLayout()
        self.channel = QComboBox()
        self.channel.setObjectName("speckle_channel")
        self.channel.currentIndexChanged.connect(self._channel_chosen)
        self.live = QCheckBox("live")
        self.live.setChecked(True)
        self.live.setToolTip("recompute the preview after every change")
        self.live.toggled.connect(lambda on: self.preview() if on else None)
        self.show_button = QPushButton("Show")
        self.show_button.setToolTip("the Preview view: raw | washed | removed of this channel")
        self.show_button.clicked.connect(lambda: self.state.request_view("preview"))
        row.addWidget(self.channel, 1)
        row.addWidget(self.live)
        row.addWidget(self.show_button)
        layout.addLayout(row)

        self.forms = {}
        self.step_labels = {}
        for step in per_channel_steps():  # one form per per-channel step of the registry
            layout.addWidget(self.caption(step.label))
            form = SettingsForm(step.settings)
            form.changed.connect(lambda k, v, name=step.name: self.change(name, k, v))
            layout.addWidget(form)
            self.forms[step.name] = form
            self.step_labels[step.name] = step.label

        self.removed_text = QLabel("—")
        self.removed_text.setObjectName("removed_fraction")
        self.removed_text.setStyleSheet("font-size: 15px; font-weight: bold;")
        self.removed_detail = QLabel("")
        self.removed_detail.setWordWrap(True)
        layout.addWidget(self.removed_text)
        layout.addWidget(self.removed_detail)
        removed_row = QHBoxLayout()
        removed_row.addWidget(QLabel("removed map of"))
        self.removed_step = QComboBox()
        self.removed_step.setObjectName("removed_step")
        self.removed_step.addItem("all steps", "")
        from plexwash.qc.steps.registry import STEPS

        for entry in STEPS:
            self.removed_step.addItem(entry.label, entry.name)
        self.removed_step.setToolTip("which step's removed map the preview shows")
        self.removed_step.currentIndexChanged.connect(lambda _i: self.last is not None and self._deliver(self.last))
        removed_row.addWidget(self.removed_step, 1)
        layout.addLayout(removed_row)

        buttons = QHBoxLayout()
        self.all_button = QPushButton("Apply to all channels")
        self.all_button.setToolTip("make this channel's settings the global ones and drop per-channel changes")
        self.all_button.clicked.connect(lambda: self.apply_to_all())
        self.reset_button = QPushButton("Use global")
        self.reset_button.setToolTip("drop this channel's own settings")
        self.reset_button.clicked.connect(self.reset_channel)
        buttons.addWidget(self.all_button)
        buttons.addWidget(self.reset_button)
        layout.addLayout(buttons)

        layout.addWidget(self.caption("Recipe"))
        self.recipe_path = PathRow("recipe.toml", save=True, file_types="Recipe (*.toml)", button="…")
        layout.addWidget(self.recipe_path)
        recipe_buttons = QHBoxLayout()
        load = QPushButton("Load")
        load.clicked.connect(lambda: self.load_recipe(self.recipe_path.path()))
        save = QPushButton("Save")
        save.clicked.connect(lambda: self.save_recipe(self.recipe_path.path()))
        recipe_buttons.addWidget(load)
        recipe_buttons.addWidget(save)
        layout.addLayout(recipe_buttons)
        self.finish_layout()

        self.state.roi_changed.connect(self._roi_changed)
        self.state.channel_changed.connect(self._select_channel)
        self.state.recipe_changed.connect(self._recipe_changed)
        self.state.spillover_changed.connect(lambda _m: self.preview())
        self.state.view_requested.connect(lambda view: view == "preview" and self.preview(force=True))
        self._roi_changed(self.state.roi)

    # ------------------------------------------------------------------ settings

    @property
    def current_channel(self) -> str | None:
        return self.channel.currentData()

    def change(self, section: str, name: str, value) -> None:
        """Set one setting of the current channel (a per-channel override) and preview it."""
        from plexwash.qc.errors import InputError

        channel = self.current_channel
        if channel is None:
            self.say("load an ROI first", warn=True)
            return
        try:
            recipe = self.state.recipe.with_channel(section, channel, **{name: value})
        except InputError as exc:
            self.fail(exc)
            return
        self.state.set_recipe(recipe)
        self.state.request_view("preview")  # tuning: show what the setting does

    def apply_to_all(self, *, ask: bool = True) -> bool:
        """Make this channel's settings the global ones, dropping every per-channel setting.

        When other channels have settings of their own, asks first (``ask=False``: does not).
        Returns whether the recipe changed.
        """
        channel = self.current_channel
        if channel is None:
            return False
        others = sorted({c for s in self.forms for c in self.state.recipe.overrides.get(s, {}) if c != channel})
        if others and ask:
            from qtpy.QtWidgets import QMessageBox

            names = ", ".join(self.state.label(c) if self.state.roi and c in self.state.roi.channels else c
                              for c in others[:6]) + (f" and {len(others) - 6} more" if len(others) > 6 else "")
            answer = QMessageBox.question(
                self, "Apply to all channels",
                f"Make the settings of {self.state.label(channel)} the global ones?\n\n"
                f"This drops the own settings of {len(others)} other channel(s): {names}.")
            if answer != QMessageBox.StandardButton.Yes:
                self.say("nothing changed")
                return False
        self.state.set_recipe(recipe_apply_to_all(self.state.recipe, channel))
        dropped = f"; own settings of {len(others)} other channel(s) dropped" if others else ""
        self.say(f"settings of {self.state.label(channel)} now apply to every channel{dropped}")
        return True

    def reset_channel(self) -> None:
        channel = self.current_channel
        if channel is None:
            return
        self.state.set_recipe(recipe_reset_channel(self.state.recipe, channel))

    def save_recipe(self, path) -> Path | None:
        from plexwash.qc import write_recipe

        if path is None:
            self.say("choose where to save the recipe", warn=True)
            return None
        from plexwash.qc.errors import InputError
        from plexwash.qc.files import check_output

        path = Path(path)
        if path.suffix.lower() != ".toml":
            path = path.with_suffix(".toml")
        try:  # never over a file the studio read, nor one plexwash did not write
            check_output(path, self.state.inputs(), kind="toml")
        except InputError as exc:
            self.fail(exc)
            return None
        write_recipe(path, self.state.recipe)
        self.recipe_path.set_path(path)
        self.say(f"recipe saved: {path}")
        return path

    def load_recipe(self, path) -> None:
        from plexwash.qc import load_recipe
        from plexwash.qc.errors import InputError

        if path is None:
            self.say("choose a recipe file", warn=True)
            return
        try:
            recipe = load_recipe(path)
        except InputError as exc:
            self.fail(exc)
            return
        self.state.set_recipe(recipe)
        self.say(f"recipe loaded: {path}")

    def _recipe_changed(self, recipe) -> None:
        self._show_settings()
        self.preview()

    def _show_settings(self) -> None:
        channel = self.current_channel
        recipe = self.state.recipe
        for section, form in self.forms.items():
            settings = recipe.for_channel(section, channel) if channel else getattr(recipe, section)
            form.set_values(settings)
        marked = []
        for section, form in self.forms.items():
            own = own_settings(recipe, section, channel) if channel else {}
            form.mark(own)
            marked += [f"{self.step_labels[section]} {name.replace('_', ' ')}" for name in own]
        has_own = channel is not None and any(channel in recipe.overrides.get(s, {}) for s in self.forms)
        self.reset_button.setEnabled(has_own)
        if channel is not None and self.state.roi is not None and channel in self.state.roi.channels:
            label = self.state.label(channel)
            self.say(f"{label}: own " + ", ".join(marked) + " (highlighted)" if marked
                     else f"{label}: global settings")

    # ------------------------------------------------------------------ channels

    def _roi_changed(self, roi) -> None:
        self.runner.stop()
        self.engine = PreviewEngine()
        self.channel.blockSignals(True)
        self.channel.clear()
        if roi is not None:
            for channel, label in zip(roi.channels, roi.labels, strict=True):
                self.channel.addItem(label if label == channel else f"{label} ({channel})", channel)
            wanted = self.state.channel if self.state.channel in roi.channels else roi.channels[0]
            self.channel.setCurrentIndex(roi.channels.index(wanted))
        self.channel.blockSignals(False)
        self._show_settings()
        if roi is not None:
            self.preview()

    def _select_channel(self, channel) -> None:
        index = self.channel.findData(channel)
        if index >= 0 and index != self.channel.currentIndex():
            self.channel.setCurrentIndex(index)

    def _channel_chosen(self, _index) -> None:
        channel = self.current_channel
        if channel is None:
            return
        self.state.set_channel(channel)
        self._show_settings()
        self.preview()

    # ------------------------------------------------------------------ preview

    def preview(self, *, force: bool = False) -> None:
        """Ask for a fresh preview of the current channel (coalesced, latest wins).

        Runs when "live" is ticked, or when asked (``force``: the Preview view was chosen).
        """
        if not (self.live.isChecked() or force) or self.state.roi is None or self.current_channel is None:
            return
        state = self.state
        channel = self.current_channel
        self.runner.request((state.roi, state.recipe, channel, state.spillover))

    def _compute(self, payload) -> ChannelPreview:
        roi, recipe, channel, spillover = payload
        return self.engine.compute(roi, recipe, channel, spillover=spillover)

    def _deliver(self, result: ChannelPreview) -> None:
        """Swap the preview into the two kept preview layers (made once, never removed), when
        the Preview view shows them (or the first time, to make them): swapping data into
        hidden layers on every channel click only cost the window time."""
        roi = self.state.roi
        if not self.alive() or roi is None or result.channel not in roi.channels:
            return
        raw = [layer for layer in studio_layers(self.viewer, stage="raw")
               if layer.metadata["plexwash"]["channel"] == result.channel]
        if not raw:
            return  # the ROI's layers are gone (or the viewer is closing): nothing to preview beside
        self.last = result
        made_once = all(len(studio_layers(self.viewer, stage=stage)) == 1 for stage in ("washed", "removed"))
        if self.state.view != "preview" and made_once:  # hidden panels: only the numbers now;
            self._show_fractions(result)  # choosing the Preview view asks for a fresh preview
            return
        limits = tuple(raw[0].contrast_limits)
        removed, removed_limits, removed_name = self._removed_view(result)
        step = roi_extent(roi)[1] * (1 + TILE_GAP)  # beside the raw channel: raw | washed | removed
        made = []
        for k, (stage, data, lims, name) in enumerate((("washed", result.washed, limits, "washed"),
                                                       ("removed", removed, removed_limits, removed_name)), 1):
            _, kwargs, _ = channel_layer(data, roi_path=roi.path, channel=result.channel,
                                         label=result.label, index=result.index, stage=stage,
                                         pixel_size=roi.pixel_size, limits=lims, visible=False)
            kwargs["name"] = f"{result.label} · {name}"
            kwargs["translate"] = (0.0, k * step)
            kept = studio_layers(self.viewer, stage=stage)
            if kept:
                swap_layer(kept[0], data, kwargs)
            else:
                from napari.layers import Image

                made.append(Image(data, **kwargs))
        if made:  # the first preview of the session: both layers at once, on top
            active = self.viewer.layers.selection.active
            self.viewer.layers.extend(made)
            if LABELS_LAYER in self.viewer.layers:  # panel names and frames stay on top
                self.viewer.layers.move(self.viewer.layers.index(LABELS_LAYER), len(self.viewer.layers))
            if active is not None:  # the raw channel stays the active layer (contrast controls)
                self.viewer.layers.selection.active = active
            keep_for_good(self.viewer)
        self._show_fractions(result)
        self.state.preview_shown.emit()  # the Preview view shows and labels them

    def _removed_view(self, result: ChannelPreview):
        """The removed map chosen below the form: all steps, or what one step took away."""
        step = self.removed_step.currentData()
        if step and step in result.removed_by_step:
            removed = result.removed_by_step[step]
            return removed, _removed_limits(removed), f"removed by {self.removed_step.currentText()}"
        return result.removed, result.removed_limits, "removed"

    def _show_fractions(self, result: ChannelPreview) -> None:
        self.removed_text.setText(f"removed {100 * result.total_fraction:.3g} % of the signal")
        from plexwash.qc.steps.registry import step

        parts = [f"{step(k).label} {100 * v:.3g} %" for k, v in result.fractions.items()]
        self.removed_detail.setText(" · ".join(parts + list(result.notes)))
        self.removed_text.setToolTip("of the raw channel's total counts; each step's share is of "
                                     "the signal entering that step")

    def closeEvent(self, event):
        self.runner.stop()
        super().closeEvent(event)
