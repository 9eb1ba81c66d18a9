"""Spillover dock widget: load or estimate the matrix, see it with its uncertainty, edit, preview, save."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
from napari.qt.threading import thread_worker
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QGridLayout,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QScrollArea,
)

from ._common import PathRow, StudioWidget, small_figure, style_axes
from ._layers import (
    channel_layer,
    find_stains,
    fit_visible,
    grid_of,
    hide_mosaic,
    keep_for_good,
    robust_limits,
    studio_layers,
    swap_layer,
)

#: What the heatmap can show.
HEATMAP_VIEWS = ("spillover %", "interval width %")
#: Heatmap colours: the studio's own ramp, deep blue-teal (0 %) through teal to pale straw.
#: Zero is a colour of its own, never the figure's background (FIGURE_BACKGROUND).
HEATMAP_COLOURS = ("#173e5c", "#1f6f7a", "#2f9f84", "#9fdc9a", "#f4f1bb")
#: The figure behind the heatmap, and the blanked diagonal.
FIGURE_BACKGROUND = "#1e2228"
DIAGONAL = "#3a4048"


def heatmap_layout(n: int, width_px: int, longest_label: int) -> dict:
    """Pixel sizes of the heatmap for ``n`` channels in a dock ``width_px`` wide.

    Cells fill the width, between 12 and 24 px (below 12 px the canvas grows wider than
    the dock and scrolls); label text follows the cell (5.5 to 8 points); the figure is
    exactly as tall as the grid and its labels (no empty space below).

    Examples
    --------
    >>> small, big = heatmap_layout(22, 420, 6), heatmap_layout(40, 420, 6)
    >>> small["cell"] >= 12 and big["cell"] >= 12, small["font"] >= big["font"] >= 5.5
    (True, True)
    >>> big["height"] == big["top"] + 40 * big["cell"] + big["bottom"]
    True
    """
    n = max(1, n)
    fixed = 150 + 6 * longest_label  # labels on the left, colour bar on the right
    cell = int(min(24, max(12, (width_px - fixed) // n)))
    font = float(min(8.0, max(5.5, 0.5 * cell)))
    label_px = int(longest_label * font * 0.75) + 24  # rotated names below, names on the left
    top, right = 8, 64
    return {"cell": cell, "font": font, "left": label_px, "bottom": label_px, "top": top,
            "right": right, "width": label_px + n * cell + right,
            "height": top + n * cell + label_px}
#: What an edit's error names (the engine's own name for a matrix it is handed).
SPILLOVER_SOURCE = "spillover matrix"


def heatmap_values(matrix, view: str = HEATMAP_VIEWS[0]) -> np.ndarray:
    """What the heatmap draws, in percent, with the diagonal (always 1) blanked.

    ``spillover %``: the values; ``interval width %``: high - low of each entry's interval
    (0 where the matrix carries no interval).

    Examples
    --------
    >>> import numpy as np
    >>> from types import SimpleNamespace
    >>> m = SimpleNamespace(values=np.array([[1.0, 0.02], [0.0, 1.0]]), low=None, high=None)
    >>> heatmap_values(m)[0, 1], bool(np.isnan(heatmap_values(m)[0, 0]))
    (2.0, True)
    """
    values = np.asarray(matrix.values, dtype=np.float64)
    if view == HEATMAP_VIEWS[0]:
        shown = 100.0 * values
    elif view == HEATMAP_VIEWS[1]:
        low, high = _interval(matrix)
        shown = 100.0 * (high - low)
    else:
        raise ValueError(f"view must be one of {HEATMAP_VIEWS}, got {view!r}")
    shown = shown.copy()
    np.fill_diagonal(shown, np.nan)
    return shown


def _interval(matrix) -> tuple[np.ndarray, np.ndarray]:
    values = np.asarray(matrix.values, dtype=np.float64)
    low = getattr(matrix, "low", None)
    high = getattr(matrix, "high", None)
    low = values if low is None else np.asarray(low, dtype=np.float64)
    high = values if high is None else np.asarray(high, dtype=np.float64)
    return low, high


def edit_entry(matrix, source: str, receiver: str, value: float):
    """A copy of a spillover matrix with one entry set by hand (its interval collapses to it).

    The copy goes through the engine's matrix check
    (:func:`plexwash.qc.spillover.check_spillover`, the one that reading a matrix file and
    compensating with a matrix use), so the editor refuses exactly what the engine
    refuses, with the engine's message.

    Raises
    ------
    InputError
        An unknown channel, or a matrix the engine refuses: a diagonal entry other than
        1, an off-diagonal entry outside [0, 1), a singular or ill-conditioned matrix.
    """
    from plexwash.qc.errors import InputError
    from plexwash.qc.spillover import check_spillover

    channels = list(matrix.channels)
    for name in (source, receiver):
        if name not in channels:
            raise InputError(SPILLOVER_SOURCE, f"no channel named {name!r}")
    i, j = channels.index(source), channels.index(receiver)
    values = np.array(matrix.values, dtype=np.float64)
    values[i, j] = value
    changes = {"values": values}
    for name in ("low", "high"):
        bound = getattr(matrix, name, None)
        if bound is not None:
            bound = np.array(bound, dtype=np.float64)
            bound[i, j] = value
            changes[name] = bound
    edited = dataclasses.replace(matrix, **changes)
    check_spillover(edited, source=SPILLOVER_SOURCE)
    return edited


def compensated_stack(roi, matrix, *, method: str | None = None):
    """The ROI's channels that the stain sheet marks ``wash`` compensated with the matrix.

    Returns ``(indices, stack)``: ROI channel indices and their compensated planes, as the
    wash's compensation step computes them (raw input, no hot-pixel step before).
    """
    from plexwash.qc.spillover import align_spillover, compensate

    used = [i for i, u in enumerate(roi.use) if u]
    names = [roi.channels[i] for i in used]
    values = align_spillover(matrix, names, source=SPILLOVER_SOURCE)
    stack = np.asarray(roi.data[used] if len(used) < len(roi.channels) else roi.data, dtype=np.float32)
    kwargs = {"method": method} if method else {}
    return used, np.asarray(compensate(stack, values, **kwargs))


class SpilloverWidget(StudioWidget):
    """The spillover matrix: load, estimate, heatmap with uncertainty, edit, preview, save."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(napari_viewer, parent)
        self.compensated: tuple | None = None
        self._fitted = False
        layout = self.layout()

        layout.addWidget(self.caption("Matrix"))
        self.read_from: list[Path] = []  # matrices and controls CSVs loaded: never saved over
        self.matrix_path = PathRow("spillover.csv", file_types="Spillover matrix (*.csv)")
        load = QPushButton("Load")
        load.clicked.connect(lambda: self.load(self.matrix_path.path()))
        self.matrix_path.layout().addWidget(load)
        layout.addWidget(self.matrix_path)

        self.controls_path = PathRow("controls.csv (single-stain controls)", file_types="Controls (*.csv)")
        estimate_controls = QPushButton("Estimate")
        estimate_controls.setToolTip("per channel pair, the ratio of background-subtracted sums over each "
                                     "control's stained pixels (hot pixels left out), with a bootstrap interval")
        estimate_controls.clicked.connect(lambda: self.estimate_controls(self.controls_path.path()))
        self.controls_path.layout().addWidget(estimate_controls)
        layout.addWidget(self.controls_path)
        self.all_pairs = QCheckBox("all channel pairs")
        self.all_pairs.setToolTip("estimate every pair, not only those physics allows when channel "
                                  "names carry masses (M±1, same-element impurities, oxides M+16)")
        layout.addWidget(self.all_pairs)
        tissue = QPushButton("Estimate from the cohort's tissue (no controls)")
        tissue.setToolTip("lower layer of each plausible pair, background per tissue/glass region; pairs the tissue cannot identify stay 0")
        tissue.clicked.connect(self.estimate_tissue)
        layout.addWidget(tissue)

        view_row = QHBoxLayout()
        view_row.addWidget(QLabel("show"))
        self.view = QComboBox()
        self.view.addItems(list(HEATMAP_VIEWS))
        self.view.currentTextChanged.connect(lambda _v: self.draw())
        view_row.addWidget(self.view, 1)
        layout.addLayout(view_row)
        self.figure, self.canvas = small_figure(height=3.6)
        self.canvas.mpl_connect("button_press_event", self._clicked)
        # the heatmap keeps readable cells at any channel count: wider than the dock, it scrolls
        self.heat_scroll = QScrollArea()
        self.heat_scroll.setObjectName("heatmap_scroll")
        self.heat_scroll.setFrameShape(QScrollArea.Shape.NoFrame)
        self.heat_scroll.setWidgetResizable(False)
        self.heat_scroll.setWidget(self.canvas)
        layout.addWidget(self.heat_scroll)

        layout.addWidget(self.caption("Entry"))
        grid = QGridLayout()
        self.source = QComboBox()
        self.receiver = QComboBox()
        self.source.setToolTip("channel whose signal spills")
        self.receiver.setToolTip("channel that receives it")
        self.value = QDoubleSpinBox()
        self.value.setRange(0.0, 100.0)
        self.value.setDecimals(4)
        self.value.setSingleStep(0.05)
        self.value.setSuffix(" %")
        set_button = QPushButton("Set")
        set_button.clicked.connect(lambda: self.set_entry(self.source.currentText(),
                                                          self.receiver.currentText(),
                                                          self.value.value() / 100.0))
        grid.addWidget(self.source, 0, 0)
        grid.addWidget(QLabel("→"), 0, 1)
        grid.addWidget(self.receiver, 0, 2)
        grid.addWidget(self.value, 1, 0)
        grid.addWidget(set_button, 1, 2)
        layout.addLayout(grid)
        self.entry_text = QLabel("")
        self.entry_text.setWordWrap(True)
        layout.addWidget(self.entry_text)
        self.source.currentTextChanged.connect(lambda _t: self._entry_changed())
        self.receiver.currentTextChanged.connect(lambda _t: self._entry_changed())

        layout.addWidget(self.caption("Preview and save"))
        preview = QPushButton("Compensate the current ROI")
        preview.setToolTip("add compensated layers; the receiving channel is shown beside its raw copy")
        preview.clicked.connect(self.preview)
        layout.addWidget(preview)
        self.save_path = PathRow("spillover.csv", save=True, file_types="Spillover matrix (*.csv)", button="…")
        save = QPushButton("Save")
        save.clicked.connect(lambda: self.save(self.save_path.path()))
        self.save_path.layout().addWidget(save)
        layout.addWidget(self.save_path)
        self.finish_layout()

        self.state.cohort_changed.connect(self._cohort_changed)
        if self.state.cohort is not None:
            self._cohort_changed(self.state.cohort)
        self.draw()

    # ------------------------------------------------------------------ getting a matrix

    @property
    def matrix(self):
        return self.state.spillover

    def _cohort_changed(self, folder):
        for candidate in (Path(folder) / "controls" / "controls.csv",
                          Path(folder).parent / "controls" / "controls.csv"):
            if candidate.is_file() and self.controls_path.path() is None:
                self.controls_path.set_path(candidate)
                break

    def load(self, path):
        from plexwash.qc.errors import InputError
        from plexwash.qc.spillover import read_spillover

        if path is None:
            self.say("choose a spillover CSV", warn=True)
            return
        try:
            matrix = read_spillover(path)
        except InputError as exc:
            self.fail(exc)
            return
        path = Path(path)
        self.read_from.append(path)
        self.save_path.set_path(path.with_name(f"{path.stem}_edited.csv"))  # never the input itself
        self.use(matrix, f"loaded {path.name}")

    def estimate_controls(self, controls_csv):
        """Estimate from single-stain controls in the background; returns the worker."""
        from plexwash.qc.spillover import estimate_from_controls

        if controls_csv is None:
            self.say("choose the controls.csv", warn=True)
            return None
        self.read_from.append(Path(controls_csv))
        self.say("estimating from controls…")
        worker = thread_worker(estimate_from_controls)(controls_csv, all_pairs=self.all_pairs.isChecked())
        return self.start(worker, on_return=lambda m: self.use(m, "estimated from controls"))

    def estimate_tissue(self):
        """Estimate from the cohort's ROIs themselves in the background; returns the worker."""
        from plexwash.qc.spillover import estimate_from_tissue

        rois = list(self.state.rois)
        if not rois:
            self.say("open a cohort first", warn=True)
            return None
        self.say(f"estimating from the tissue of {len(rois)} ROIs…")

        worker = thread_worker(estimate_from_tissue)(rois, stains=find_stains(rois[0]),
                                                     all_pairs=self.all_pairs.isChecked())
        return self.start(worker, on_return=lambda m: self.use(m, "estimated from tissue"))

    def use(self, matrix, how: str) -> None:
        """Make ``matrix`` the studio's spillover matrix and show it."""
        self.state.set_spillover(matrix)
        self._fill_channels()
        self.draw()
        self.say(f"{how}: {len(matrix.channels)} channels")

    def set_entry(self, source: str, receiver: str, value: float) -> None:
        from plexwash.qc.errors import InputError

        if self.matrix is None:
            self.say("load or estimate a matrix first", warn=True)
            return
        try:
            matrix = edit_entry(self.matrix, source, receiver, value)
        except InputError as exc:
            self.fail(exc)
            return
        self.state.set_spillover(matrix)
        self.draw()
        self._entry_changed()
        self.say(f"set {source} → {receiver} to {100 * value:.4g} %")

    def save(self, path) -> Path | None:
        from plexwash.qc.spillover import write_spillover

        if self.matrix is None or path is None:
            self.say("nothing to save yet" if self.matrix is None else "choose where to save", warn=True)
            return None
        from plexwash.qc.errors import InputError
        from plexwash.qc.files import check_output

        path = Path(path)
        try:  # never over a file the studio read (a control image, say), nor one plexwash did not write
            check_output(path, self.state.inputs(*self.read_from), kind="csv")
        except InputError as exc:
            self.fail(exc)
            return None
        write_spillover(path, self.matrix)
        self.state.set_recipe(self.state.recipe.replace("compensation", spillover=str(path)))
        self.say(f"saved {path}; the recipe now names it")
        return path

    # ------------------------------------------------------------------ display

    def _fill_channels(self):
        channels = list(self.matrix.channels) if self.matrix is not None else []
        for combo in (self.source, self.receiver):
            current = combo.currentText()
            combo.blockSignals(True)
            combo.clear()
            combo.addItems(channels)
            if current in channels:
                combo.setCurrentText(current)
            combo.blockSignals(False)
        if len(channels) > 1 and self.source.currentText() == self.receiver.currentText():
            self.receiver.setCurrentIndex(1)
        self._entry_changed()

    def _size_canvas(self, width: int, height: int) -> None:
        """Give the canvas (and the figure) a size in pixels; the scroll area fits its height."""
        dpi = self.figure.get_dpi()
        if (self.canvas.width(), self.canvas.height()) != (width, height):
            self.canvas.setFixedSize(width, height)
            self.figure.set_size_inches(width / dpi, height / dpi, forward=False)
        bar = self.heat_scroll.horizontalScrollBar().sizeHint().height()
        wide = width > self.heat_scroll.viewport().width() > 0
        self.heat_scroll.setFixedHeight(height + (bar if wide else 0) + 2)

    def draw(self):
        from matplotlib.colors import LinearSegmentedColormap

        self.figure.clear()
        matrix = self.matrix
        available = max(self.heat_scroll.viewport().width(), self.width() - 24, 320)
        if matrix is None:
            self._size_canvas(available, 120)
            ax = self.figure.add_axes([0, 0, 1, 1])
            style_axes(ax)
            ax.text(0.5, 0.5, "no matrix yet", ha="center", va="center", color="#8a949e",
                    transform=ax.transAxes)
            ax.set_xticks([])
            ax.set_yticks([])
            self.canvas.draw_idle()
            return
        names = list(matrix.channels)
        n = len(names)
        box = heatmap_layout(n, available, max(len(name) for name in names))
        width, height = box["width"], box["height"]
        self._size_canvas(width, height)
        grid = n * box["cell"]
        ax = self.figure.add_axes([box["left"] / width, box["bottom"] / height, grid / width, grid / height])
        style_axes(ax)
        shown = heatmap_values(matrix, self.view.currentText())
        ramp = LinearSegmentedColormap.from_list("plexwash heat", HEATMAP_COLOURS).with_extremes(bad=DIAGONAL)
        top = np.nanmax(shown) if np.isfinite(shown).any() else 1.0
        image = ax.imshow(shown, cmap=ramp, vmin=0.0, vmax=top if top > 0 else 1.0,
                          interpolation="nearest", aspect="auto")
        ticks = np.arange(n)
        size = box["font"]
        ax.set_xticks(ticks)
        ax.set_yticks(ticks)
        ax.set_xticklabels(names, rotation=90, fontsize=size)
        ax.set_yticklabels(names, fontsize=size)
        ax.tick_params(length=2, pad=1, labelsize=size)
        ax.set_xlabel("receiving channel", color="#cfd6dd", fontsize=7, labelpad=2)
        ax.set_ylabel("spilling channel", color="#cfd6dd", fontsize=7, labelpad=2)
        if self.source.currentText() in names and self.receiver.currentText() in names:
            i, j = names.index(self.source.currentText()), names.index(self.receiver.currentText())
            ax.add_patch(_frame_patch(j, i))
        bar_ax = self.figure.add_axes([(box["left"] + grid + 8) / width, box["bottom"] / height,
                                       12 / width, grid / height])
        bar = self.figure.colorbar(image, cax=bar_ax)
        bar.ax.tick_params(colors="#cfd6dd", labelsize=6)
        bar.set_label(self.view.currentText(), color="#cfd6dd", fontsize=7)
        self.canvas.draw_idle()

    def _clicked(self, event):
        if self.matrix is None or event.xdata is None or event.inaxes is not self.figure.axes[0]:
            return
        names = list(self.matrix.channels)
        j, i = int(round(event.xdata)), int(round(event.ydata))
        if 0 <= i < len(names) and 0 <= j < len(names) and i != j:
            self.source.setCurrentText(names[i])
            self.receiver.setCurrentText(names[j])

    def _entry_changed(self):
        matrix = self.matrix
        source, receiver = self.source.currentText(), self.receiver.currentText()
        if matrix is None or not source or not receiver:
            self.entry_text.setText("")
            return
        names = list(matrix.channels)
        i, j = names.index(source), names.index(receiver)
        low, high = _interval(matrix)
        value = float(matrix.values[i, j])
        self.value.blockSignals(True)
        self.value.setValue(100.0 * value)
        self.value.blockSignals(False)
        if i == j:
            self.entry_text.setText(f"{source}: diagonal (1 by definition)")
        else:
            self.entry_text.setText(f"{source} → {receiver}: {100 * value:.4g} % "
                                    f"(interval {100 * low[i, j]:.4g} – {100 * high[i, j]:.4g} %)")
        self.draw()
        self._show_receiver()

    # ------------------------------------------------------------------ preview

    def preview(self):
        """Compensate the current ROI in the background and add its compensated layers."""
        roi, matrix = self.state.roi, self.matrix
        if roi is None or matrix is None:
            self.say("load an ROI and a matrix first", warn=True)
            return None
        method = self.state.recipe.compensation.method
        self.say(f"compensating {roi.name}…")
        worker = thread_worker(compensated_stack)(roi, matrix, method=method)
        return self.start(worker, on_return=lambda result: self._show_compensated(roi, *result))

    def _show_compensated(self, roi, used, stack):
        if roi is not self.state.roi or roi.labels[used[0]] not in self.viewer.layers:
            return  # another ROI is loaded, or its layers are gone
        # one compensated layer, beside the raw one, showing the receiving channel; its pixels
        # are swapped when the receiver changes. One layer per channel made every show / hide
        # of any layer walk 36 more layers (napari updates its scene graph per layer).
        self.compensated = (roi, used, stack)
        self._fitted = False
        self._show_receiver()
        self.say(f"{roi.name}: {len(used)} channels compensated (receiving channel shown beside raw)")

    def _compensated_layer(self, roi, index: int, plane):
        """The one compensated layer, with ``plane`` (channel ``index`` of ``roi``) in it; made on
        first use, later given the new pixels."""
        label, channel = roi.labels[index], roi.channels[index]
        limits = (tuple(self.viewer.layers[label].contrast_limits)
                  if label in self.viewer.layers else robust_limits(plane))
        data, kwargs, _ = channel_layer(plane, roi_path=roi.path, channel=channel, label=label, index=index,
                                        stage="compensated", pixel_size=roi.pixel_size, visible=False, limits=limits)
        width = roi.shape[2] * (roi.pixel_size[1] if roi.pixel_size else 1.0)
        kwargs["translate"] = (0.0, width * 1.04)
        kept = studio_layers(self.viewer, stage="compensated")
        if kept:
            swap_layer(kept[0], data, kwargs)
            return kept[0]
        active = self.viewer.layers.selection.active
        layer = self.viewer.add_image(data, **kwargs)
        if active is not None:  # the active layer (and its contrast controls) unchanged
            self.viewer.layers.selection.active = active
        keep_for_good(self.viewer)
        return layer

    def _show_receiver(self):
        """Side by side: the chosen receiving channel raw, and compensated; everything else hidden."""
        roi = self.state.roi
        receiver = self.receiver.currentText()
        if roi is None or self.compensated is None or self.compensated[0] is not roi:
            return
        if receiver not in roi.channels:
            return
        _, used, stack = self.compensated
        index = roi.channel_index(receiver)
        shown = self._compensated_layer(roi, index, stack[used.index(index)]) if index in used else None
        grid_of(self.viewer).enabled = False
        hide_mosaic(self.viewer)  # the Cohort grid's picture, if shown
        with self.viewer.layers.batched_update():  # one scene-graph update, not one per layer
            for layer in studio_layers(self.viewer):
                meta = layer.metadata["plexwash"]
                show = meta["channel"] == receiver and (meta["stage"] == "raw" or (
                    meta["stage"] == "compensated" and shown is not None))
                if layer.visible != show:
                    layer.visible = show
        if not self._fitted:
            self._fitted = True
            fit_visible(self.viewer)


def _frame_patch(x: int, y: int):
    from matplotlib.patches import Rectangle

    return Rectangle((x - 0.5, y - 0.5), 1, 1, fill=False, edgecolor="#ff6b3d", linewidth=1.2)
