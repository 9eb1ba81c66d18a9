"""Cohort dock widget: open a cohort, see each ROI's flags, load one, view its channels."""

from __future__ import annotations

import contextlib
import weakref
from pathlib import Path

from napari.qt.threading import thread_worker
from qtpy.QtCore import Qt, QTimer
from qtpy.QtWidgets import (
    QAbstractItemView,
    QButtonGroup,
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
)

from ._common import WARN, PathRow, StudioWidget, qcolor
from ._layers import (
    CONTRAST_PERCENTILES,
    GRID_LABELS_LAYER,
    GRID_LAYER,
    LABELS_LAYER,
    PALETTE,
    PREVIEW_STAGES,
    colormap_for,
    fit_visible,
    grey_colormap,
    grid_mosaic,
    grid_of,
    grid_tiles,
    hide_labels,
    hide_mosaic,
    overlay_hues,
    place,
    prepare_tile_layers,
    robust_limits,
    roi_extent,
    set_colormap,
    show_labels,
    show_mosaic,
    show_roi_layers,
    studio_layers,
    tile_offset,
    tile_origins,
)
from ._mask import hide_tissue, outline_tissue, roi_tissue, tissue_share
from ._quality import measure_rows
from ._reader import load_roi_with_tiles, read_with_stains
from ._roi_list import (
    ALL_BATCHES,
    flag_choices,
    read_quality_table,
    refill,
    roi_entries,
    row_shown,
    summarize_flags,
)

VIEWS = ("single", "grid", "overlay", "preview")
LOOKS = ("hues", "grey", "one hue")


# --------------------------------------------------------------------------- widget


class CohortWidget(StudioWidget):
    """Open a cohort folder, list its ROIs with flags, load one, show one, all or some channels."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(napari_viewer, parent)
        self.view = "single"
        self.run_quality: dict[str, dict[str, list[dict]]] = {}  # the state's, also kept here
        self._flag_worker = None
        self._loading: Path | None = None
        self._framing: tuple | None = None
        self._tiles: tuple | None = None  # (roi, block-averaged channels, block size) of the grid view
        self._mosaic: tuple | None = None  # (tiles, (contrast, hues) it was drawn with, RGB picture)
        self._followed = weakref.WeakSet()  # raw layers whose contrast sliders redraw the grid
        self._regrid = QTimer(self)  # coalesced: one grid picture for a burst of slider moves
        self._regrid.setSingleShot(True)
        self._regrid.setInterval(30)
        self._regrid.timeout.connect(lambda: self.view == "grid" and self.set_view("grid"))
        layout = self.layout()

        layout.addWidget(self.caption("Cohort folder"))
        self.folder = PathRow("folder of ROIs (.ome.tiff, .tiff, .ome.zarr)", folder=True, button="Open…")
        self.folder.changed.connect(lambda text: self.open_cohort(text) if text else None)
        layout.addWidget(self.folder)
        self.run_folder = PathRow("run output folder (optional: flags from its quality.csv)",
                                  folder=True, button="Choose…")
        self.run_folder.changed.connect(lambda text: self.use_run_folder(text or None))
        layout.addWidget(self.run_folder)

        self.table = QTableWidget(0, 4)
        self.table.setObjectName("roi_table")
        self.table.setHorizontalHeaderLabels(["ROI", "raw flags", "washed flags", "batch"])
        self.table.horizontalHeaderItem(0).setToolTip("the ROI's path in the cohort folder")
        self.table.horizontalHeaderItem(1).setToolTip("inspect-style quality of the raw ROI")
        self.table.horizontalHeaderItem(2).setToolTip("from the run's quality.csv, when one is chosen")
        self.table.horizontalHeaderItem(3).setToolTip("from the cohort's samples.csv, when it has one")
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(0, QHeaderView.ResizeMode.ResizeToContents)
        header.setSectionResizeMode(1, QHeaderView.ResizeMode.Stretch)
        header.setSectionResizeMode(2, QHeaderView.ResizeMode.Stretch)
        header.setSectionResizeMode(3, QHeaderView.ResizeMode.ResizeToContents)
        row_height = self.fontMetrics().height() + 8
        self.table.verticalHeader().setDefaultSectionSize(row_height)
        # the dock scrolls rather than squeezing the lists: at least 5 ROIs and 10 channels show
        self.table.setMinimumHeight(6 * row_height + 4)
        self.table.cellClicked.connect(lambda row, _col: self.load(row))
        layout.addWidget(self.table, 1)
        filters = QHBoxLayout()
        filters.addWidget(QLabel("show"))
        self.batch_filter, self.flag_filter = QComboBox(), QComboBox()
        self.batch_filter.setObjectName("batch_filter")
        self.batch_filter.setToolTip("only the ROIs of one batch (samples.csv)")
        self.flag_filter.setObjectName("flag_filter")
        self.flag_filter.setToolTip("only the ROIs with a flag (raw or washed), without one, or with one flag")
        self.batch_filter.addItem(ALL_BATCHES)
        self.flag_filter.addItems(flag_choices([]))
        for box in (self.batch_filter, self.flag_filter):
            box.currentTextChanged.connect(lambda _t: self.apply_filters())
            filters.addWidget(box, 1)
        layout.addLayout(filters)

        layout.addWidget(self.caption("Channels"))
        self.channels = QListWidget()
        self.channels.setObjectName("channel_list")
        self.channels.setToolTip("click: tune this channel · tick: include it in the overlay")
        self.channels.currentItemChanged.connect(self._channel_clicked)
        self.channels.itemChanged.connect(self._channel_ticked)
        self.channels.setMinimumHeight(10 * row_height)
        layout.addWidget(self.channels, 2)

        views = QHBoxLayout()
        self.view_buttons = QButtonGroup(self)
        for key, text, tip in (
            ("single", "One", "only the chosen channel"),
            ("grid", "Grid", "every channel side by side"),
            ("overlay", "Overlay", "ticked channels blended, one hue per marker"),
            ("preview", "Preview", "the chosen channel raw | washed | removed (Speckle widget settings)"),
        ):
            button = QPushButton(text)
            button.setCheckable(True)
            button.setToolTip(tip)
            button.setObjectName(f"view_{key}")
            button.clicked.connect(lambda _=False, k=key: self.set_view(k))
            self.view_buttons.addButton(button)
            views.addWidget(button)
        self.view_buttons.setExclusive(True)
        self.view_buttons.buttons()[0].setChecked(True)
        layout.addLayout(views)
        look_row = QHBoxLayout()
        look_row.addWidget(QLabel("one / grid in"))
        self.look = QComboBox()
        self.look.setObjectName("view_look")
        self.look.addItems(list(LOOKS))
        self.look.setToolTip("hues: one per marker · grey or one hue: judge single channels alike")
        self.look.currentTextChanged.connect(lambda _t: self.set_view(self.view))
        look_row.addWidget(self.look, 1)
        self.tissue = QCheckBox("tissue")
        self.tissue.setObjectName("show_tissue")
        self.tissue.setToolTip("outline the tissue mask the cleaning steps use (glass left out)")
        self.tissue.toggled.connect(lambda on: self.show_tissue() if on else hide_tissue(self.viewer))
        look_row.addWidget(self.tissue)
        layout.addLayout(look_row)

        contrast = QHBoxLayout()
        contrast.addWidget(QLabel("contrast %"))
        self.low = _percent_box(CONTRAST_PERCENTILES[0], "percentile shown as black")
        self.high = _percent_box(CONTRAST_PERCENTILES[1], "percentile shown at full colour")
        contrast.addWidget(self.low)
        contrast.addWidget(QLabel("–"))
        contrast.addWidget(self.high)
        rescale = QPushButton("Rescale")
        rescale.setToolTip("set every channel's contrast from these percentiles of its pixels")
        rescale.clicked.connect(self.rescale)
        contrast.addWidget(rescale)
        layout.addLayout(contrast)
        self.finish_layout()
        self.state.run_finished.connect(lambda summary: self.use_run_folder(summary.out_dir))
        self.state.view_requested.connect(lambda view: view != self.view and self.set_view(view))
        # in its own turn of the event loop: the window draws between the data swap and the relabel
        self.state.preview_shown.connect(lambda: QTimer.singleShot(0, self._preview_shown))

    # ------------------------------------------------------------------ cohort

    def open_cohort(self, folder):
        """List the ROIs of a folder and start measuring their raw flags in the background."""
        from plexwash.qc.errors import InputError
        from plexwash.qc.io import list_cohort

        folder = Path(folder).expanduser()
        try:
            rois = list_cohort(folder)
        except InputError as exc:
            self.fail(exc)
            return None
        self.folder.set_path(folder)
        self.state.set_cohort(folder, rois)
        self.table.setRowCount(len(rois))
        entries, problem = roi_entries(folder, rois)
        own_table = folder / "quality.csv"
        for r, (rid, path, batch) in enumerate(entries):
            item = QTableWidgetItem(rid)
            item.setData(Qt.ItemDataRole.UserRole, str(path))
            item.setToolTip(str(path))
            self.table.setItem(r, 0, item)
            self.table.setItem(r, 1, QTableWidgetItem("—" if own_table.is_file() else "measuring…"))
            self.table.setItem(r, 2, QTableWidgetItem("—"))
            self.table.setItem(r, 3, QTableWidgetItem(batch))
        self._fill_filters(sorted({batch for _r, _p, batch in entries if batch}))
        if own_table.is_file():  # a run's output folder opened as a cohort: its ROIs are washed
            self.use_run_folder(folder)  # the run's own table, raw and washed; nothing re-measured
            self.say(f"{len(rois)} washed ROIs in {folder}: flags from its quality.csv")
            return None
        if self.state.run_dir is not None:
            self.use_run_folder(self.state.run_dir)
        self.say(f"{len(rois)} ROIs in {folder}" + (f" (no batches: {problem})" if problem else ""),
                 warn=problem is not None)
        return self._measure_flags(rois)

    def _measure_flags(self, rois):
        if self._flag_worker is not None:
            self._flag_worker.quit()
        recipe, spillover = self.state.recipe, self.state.spillover

        @thread_worker
        def flags():
            for path in rois:
                try:
                    roi = read_with_stains(path)
                except Exception as exc:  # one bad ROI must not stop the others
                    yield path, key(path), exc
                    continue
                yield path, key(path), measure_rows(roi, recipe, spillover=spillover)

        key = self.state.roi_key
        worker = flags()
        self._flag_worker = worker
        self.state.pending_quality = {key(p) for p in rois}
        worker.finished.connect(lambda: self._flags_done(worker))
        return self.start(worker, on_yield=self._flags_arrived)

    def _flags_done(self, worker):
        if self._flag_worker is worker:
            self._flag_worker = None
            self.state.pending_quality = set()

    def _flags_arrived(self, result):
        path, name, rows = result
        row = self._row_of_path(path)
        if isinstance(rows, Exception):
            if row is not None:
                self.table.setItem(row, 1, QTableWidgetItem(f"unreadable: {rows}"))
            self.state.pending_quality.discard(name)
            return
        self.state.set_quality(name, rows)
        if row is not None:
            self._set_flag_cell(row, 1, rows)
            self._fill_filters()

    def use_run_folder(self, folder):
        """Show washed flags from ``<folder>/quality.csv`` (raw ones too when it holds them)."""
        if folder is None:
            self.run_quality = self.state.run_quality = {}
            return
        folder = Path(folder)
        table = folder / "quality.csv"
        if not table.is_file():
            self.say(f"no quality.csv in {folder}", warn=True)
            return
        self.run_folder.set_path(folder)
        self.state.run_dir = folder
        self.run_quality = self.state.run_quality = read_quality_table(table)
        own = self.state.cohort is not None and self.state.cohort.resolve() == folder.resolve()
        for name, stages in self.run_quality.items():
            row = self._row_of(name)
            if row is None:
                continue
            if "washed" in stages:
                self._set_flag_cell(row, 2, stages["washed"])
            if "raw" in stages and (own or self.table.item(row, 1).text() == "measuring…"):
                self._set_flag_cell(row, 1, stages["raw"])
        self._fill_filters()
        self.state.run_quality_changed.emit(folder)

    def _row_of(self, name: str):
        for r in range(self.table.rowCount()):
            if self.table.item(r, 0).text() == name:
                return r
        return None

    def _row_of_path(self, path):
        for r in range(self.table.rowCount()):
            if self.table.item(r, 0).data(Qt.ItemDataRole.UserRole) == str(path):
                return r
        return None

    def _set_flag_cell(self, row: int, column: int, rows: list[dict]):
        text = summarize_flags(rows)
        item = QTableWidgetItem(text)
        item.setToolTip(text)
        if text not in ("ok", ""):
            item.setForeground(qcolor(WARN))
        self.table.setItem(row, column, item)

    def _cells(self, row: int, *columns: int) -> list[str]:
        return [item.text() if (item := self.table.item(row, c)) is not None else "" for c in columns]

    def _fill_filters(self, batches=None) -> None:
        """Refill the flag filter from the flags shown (and the batch filter from ``batches``),
        keeping the choices that still exist, then hide the rows they leave out."""
        boxes = [(self.flag_filter, flag_choices(
            [t for r in range(self.table.rowCount()) for t in self._cells(r, 1, 2)]))]
        if batches is not None:
            boxes.append((self.batch_filter, [ALL_BATCHES, *batches]))
        for box, entries in boxes:
            refill(box, entries)
        self.apply_filters()

    def apply_filters(self) -> int:
        """Hide the ROI rows the batch and flag filters leave out; returns how many show."""
        batch, flag = self.batch_filter.currentText(), self.flag_filter.currentText()
        shown = 0
        for r in range(self.table.rowCount()):
            keep = row_shown(*self._cells(r, 3), self._cells(r, 1, 2), batch, flag)
            self.table.setRowHidden(r, not keep)
            shown += keep
        return shown

    # ------------------------------------------------------------------ ROI

    def load(self, row: int):
        """Load the ROI in table row ``row`` in the background; returns the worker."""
        item = self.table.item(row, 0)
        if item is None:
            return None
        return self.load_path(Path(item.data(Qt.ItemDataRole.UserRole)))

    def load_path(self, path):
        path = Path(path)
        self._loading = path
        low, high = self.low.value(), self.high.value()
        self.say(f"loading {path.name}…")
        worker = thread_worker(load_roi_with_tiles)(path, low=min(low, high - 0.1), high=high)
        return self.start(worker, on_return=lambda result: self._show_roi(path, *result))

    def _show_roi(self, path, roi, layers, tiles=None):
        if path != self._loading:
            return  # a later click won
        self._tiles = (roi, *tiles) if tiles is not None else None
        kept = show_roi_layers(self.viewer, layers)
        for layer in studio_layers(self.viewer, stage="raw"):  # napari's contrast sliders act on the grid
            if layer not in self._followed:
                self._followed.add(layer)
                layer.events.contrast_limits.connect(lambda _e: self.view == "grid" and self._regrid.start())
        if not kept:
            prepare_tile_layers(self.viewer, roi_extent(roi))
        if self.view != "grid":  # the grid's frames and names made now, hidden: not on the Grid click
            self._fill_grid_labels(roi)
        if not kept and self.state.owns_process:
            import gc

            gc.freeze()  # the new layers live as long as the window: later collections skip them
        self.state.set_roi(roi)
        self._fill_channels(roi)
        self._framing = None  # a new ROI: fit it
        self.set_view(self.view)
        self.say(f"{roi.name}: {len(roi.channels)} channels, {roi.shape[1]} x {roi.shape[2]} px")
        if self.tissue.isChecked():
            self.show_tissue()

    def show_tissue(self):
        """Compute the current ROI's tissue mask in a worker and outline it; returns the worker."""
        roi = self.state.roi
        if roi is None:
            return None

        def shown(mask):
            if roi is not self.state.roi or not self.tissue.isChecked():
                return  # another ROI meanwhile, or the box was unticked
            outline_tissue(self.viewer, mask, scale=roi.pixel_size)
            self.say(f"{roi.name}: tissue covers {100 * tissue_share(mask):.3g} % of the ROI")

        return self.start(thread_worker(roi_tissue)(roi), on_return=shown)

    def _fill_channels(self, roi):
        self.channels.blockSignals(True)
        self.channels.clear()
        for i, (channel, label) in enumerate(zip(roi.channels, roi.labels, strict=True)):
            text = label if label == channel else f"{label}  ({channel})"
            item = QListWidgetItem(text)
            item.setData(Qt.ItemDataRole.UserRole, channel)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Checked if i < 3 else Qt.CheckState.Unchecked)
            self.channels.addItem(item)
        index = roi.channel_index(self.state.channel) if self.state.channel in roi.channels else 0
        self.channels.setCurrentRow(index)
        self.channels.blockSignals(False)

    def _channel_clicked(self, item, _previous=None):
        if item is None:
            return
        self.state.set_channel(item.data(Qt.ItemDataRole.UserRole))
        if self.view == "single":
            self.set_view("single")

    def _channel_ticked(self, _item):
        if self.view == "overlay":
            self.set_view("overlay")

    def ticked(self) -> list[str]:
        """Acquisition names of the ticked channels."""
        return [self.channels.item(i).data(Qt.ItemDataRole.UserRole)
                for i in range(self.channels.count())
                if self.channels.item(i).checkState() == Qt.CheckState.Checked]

    def set_ticked(self, channels) -> None:
        wanted = set(channels)
        for i in range(self.channels.count()):
            item = self.channels.item(i)
            checked = item.data(Qt.ItemDataRole.UserRole) in wanted
            item.setCheckState(Qt.CheckState.Checked if checked else Qt.CheckState.Unchecked)

    # ------------------------------------------------------------------ views

    def set_view(self, view: str) -> None:
        """``single`` (the chosen channel), ``grid`` (all channels, labelled), ``overlay`` (ticked
        ones blended) or ``preview`` (the chosen channel raw | washed | removed, labelled)."""
        if view not in VIEWS:
            raise ValueError(f"view must be one of {VIEWS}, got {view!r}")
        changed = view != self.view
        self.view = self.state.view = view
        for button in self.view_buttons.buttons():
            button.setChecked(button.objectName() == f"view_{view}")
        if not studio_layers(self.viewer, stage="raw") or self.state.roi is None:
            return
        hues = overlay_hues(self.ticked(), self._marker_index()) if view == "overlay" else {}
        roi = self.state.roi
        extent = roi_extent(roi)
        raw = studio_layers(self.viewer, stage="raw")
        channel = self.state.channel
        tiles = dict(zip((layer.metadata["plexwash"]["channel"] for layer in raw),
                         tile_origins(len(raw), extent), strict=True)) if view == "grid" else {}
        grid = grid_of(self.viewer)
        if grid.enabled:
            grid.enabled = False  # the studio tiles layers itself: napari's grid relays out per layer
        labels, plan = [], []
        for layer in studio_layers(self.viewer):
            meta = layer.metadata["plexwash"]
            stage = meta["stage"]
            origin = (0.0, 0.0)
            if stage == "raw":
                if view == "grid":  # one picture of every channel's tile instead (_show_grid)
                    show = False
                    labels.append((tiles[meta["channel"]], layer.name))
                elif view == "overlay":
                    show = meta["channel"] in hues
                else:
                    show = meta["channel"] == channel
                    if view == "preview" and show:
                        labels.insert(0, (origin, f"{layer.name} · raw"))
                set_colormap(layer, self._colormap(meta, hues.get(meta["channel"]), view))
            elif stage in PREVIEW_STAGES:
                show = view == "preview" and meta["channel"] == channel
                if stage == "washed":  # washed in the raw channel's look, to compare like with like
                    set_colormap(layer, self._colormap(meta, None, view))
                origin = tuple(layer.translate)
                if show:
                    labels.append((origin, layer.name))
                elif view == "preview":  # its channel's preview is on its way: the panel's frame now,
                    labels.append((origin, f"{stage} (computing…)"))  # its name swapped in later
            else:
                show, origin = False, tuple(layer.translate)
            plan.append((layer, show, origin))
        changes = sum(layer.visible != show for layer, show, _ in plan)
        shown_labels = GRID_LABELS_LAYER if view == "grid" else LABELS_LAYER
        for name, wanted in ((GRID_LAYER, view == "grid"), (LABELS_LAYER, bool(labels) and view != "grid"),
                             (GRID_LABELS_LAYER, bool(labels) and view == "grid")):
            changes += (self.viewer.layers[name].visible if name in self.viewer.layers else False) != wanted
        # layers shown or hidden: one scene-graph update (and draw) at the end, not one per layer
        # (each update walks every layer: ~0.1 s once a 36-channel ROI is compensated)
        batch = self.viewer.layers.batched_update() if changes > 1 else contextlib.nullcontext()
        with batch:
            for layer, show, origin in plan:
                if layer.visible != show:
                    layer.visible = show
                if show:
                    place(layer, origin)
            if view == "grid":
                self._show_grid(raw, tiles)
            else:
                hide_mosaic(self.viewer)
            if labels:
                show_labels(self.viewer, labels, extent, name=shown_labels)
            hide_labels(self.viewer, keep=shown_labels if labels else None)
        # refit when what is shown changes shape (another view, the preview's panels arriving,
        # another ROI size), not on a channel switch: the user's zoom stays for comparing channels
        framing = (view, sum(show for _, show, _ in plan), extent)
        if changed or framing != self._framing:
            self._framing = framing
            fit_visible(self.viewer)
        if view == "preview" and changed:
            self.state.view_requested.emit("preview")  # the Speckle widget makes one if needed
        if view == "overlay" and len(hues) > len(PALETTE):
            self.say(f"more than {len(PALETTE)} channels ticked: hues repeat", warn=True)

    def _show_grid(self, raw, corners) -> None:
        """Every channel's tile (block-averaged on the load worker, full size kept for the other
        views) in one RGB layer, in each raw layer's contrast and the chosen look."""
        roi = self.state.roi
        if self._tiles is None or self._tiles[0] is not roi:  # an ROI shown without its tiles
            self._tiles = (roi, *grid_tiles(roi))
        _, data, factor = self._tiles
        metas = [layer.metadata["plexwash"] for layer in raw]
        limits = tuple(tuple(float(v) for v in layer.contrast_limits) for layer in raw)
        colours = tuple(tuple(float(c) for c in self._colormap(meta, None, "grid").colors[-1][:3]) for meta in metas)
        if self._mosaic is None or self._mosaic[0] is not data or self._mosaic[1] != (limits, colours):
            size = roi.pixel_size or (1.0, 1.0)
            pixel_corners = [(corners[m["channel"]][0] / float(size[0]), corners[m["channel"]][1] / float(size[1]))
                             for m in metas]
            rgb = grid_mosaic([data[m["index"]] for m in metas], pixel_corners, factor, limits, colours)
            self._mosaic = (data, (limits, colours), rgb)
        size = roi.pixel_size or (1.0, 1.0)
        show_mosaic(self.viewer, self._mosaic[2], tuple(factor * float(s) for s in size), tile_offset(factor, size))

    def _marker_index(self) -> dict[str, int]:
        roi = self.state.roi
        return {} if roi is None else {c: i for i, c in enumerate(roi.channels)}

    def _colormap(self, meta: dict, hue: int | None, view: str):
        if view == "overlay":
            return colormap_for(hue if hue is not None else meta["index"])
        look = self.look.currentText()
        if look == "grey":
            return grey_colormap()
        if look == "one hue":
            return colormap_for(0)
        return colormap_for(meta["index"])

    def _fill_grid_labels(self, roi) -> None:
        raw = studio_layers(self.viewer, stage="raw")
        extent = roi_extent(roi)
        tiles = list(zip(tile_origins(len(raw), extent), (layer.name for layer in raw), strict=True))
        show_labels(self.viewer, tiles, extent, name=GRID_LABELS_LAYER, visible=False)

    def _preview_shown(self) -> None:
        if self.alive() and self.view == "preview" and self.state.roi is not None:
            self.set_view("preview")

    def busy(self) -> bool:
        return super().busy() or self._regrid.isActive()

    def rescale(self) -> None:
        """Contrast of every studio layer from the percentile boxes."""
        low, high = self.low.value(), self.high.value()
        if low >= high:
            self.say("the low percentile must be below the high one", warn=True)
            return
        for layer in studio_layers(self.viewer):
            lo, hi = robust_limits(layer.data, low=low, high=high)
            layer.contrast_limits = (lo, hi)
        if self.view == "grid":
            self.set_view("grid")  # the grid's picture is drawn with the channels' contrast


def _percent_box(value: float, tip: str) -> QDoubleSpinBox:
    box = QDoubleSpinBox()
    box.setRange(0.0, 100.0)
    box.setDecimals(2)
    box.setSingleStep(0.1)
    box.setValue(value)
    box.setToolTip(tip)
    box.setButtonSymbols(QDoubleSpinBox.ButtonSymbols.NoButtons)
    box.setMinimumWidth(56)
    return box
