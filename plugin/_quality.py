"""Quality dock widget: per-channel metrics and flags of the current ROI, sortable, with a plot."""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
from napari.qt.threading import thread_worker
from qtpy.QtCore import Qt, QTimer
from qtpy.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QSizePolicy,
    QTableWidget,
    QTableWidgetItem,
)

from ._common import ACCENT, WARN, StudioWidget, qcolor, style_axes
from ._preview import LatestOnly

#: Table columns: (row key, header, number format or None for text). The flags come early so
#: that a narrow dock shows them; "#" is the stain sheet position (sort by it to get stains order).
COLUMNS = (
    ("position", "#", "{:d}"),
    ("channel", "channel", None),
    ("label", "label", None),
    ("flags", "flags", None),
    ("sbr", "SBR", "{:.3g}"),
    ("snr", "SNR", "{:.3g}"),
    ("foreground_fraction", "fg %", "pct"),
    ("saturated_fraction", "sat %", "pct"),
    ("spikes", "spikes", "{:d}"),
)
#: What the table can show: (stage, source, text). "measure" runs the engine here; "run"
#: shows the rows of the run's own quality.csv (a run folder chosen or opened as a cohort).
SOURCES = (
    ("raw", "measure", "raw (measured here)"),
    ("washed", "measure", "washed (current recipe)"),
    ("raw", "run", "raw (run's quality.csv)"),
    ("washed", "run", "washed (run's quality.csv)"),
    ("both", "measure", "raw | washed side by side (current recipe)"),
    ("both", "run", "raw | washed side by side (run's quality.csv)"),
)
STAGES = ("raw", "washed")
#: Keys shown twice, raw then washed, when both stages are side by side.
PAIRED = ("flags", "sbr", "snr", "foreground_fraction", "saturated_fraction", "spikes")
#: Columns of the side-by-side table: each paired key as ``raw <key>`` and ``washed <key>``.
BOTH_COLUMNS = (COLUMNS[0], COLUMNS[1], COLUMNS[2]) + tuple(
    (f"{stage} {key}", f"{stage[0]}·{header}", fmt)
    for key, header, fmt in COLUMNS if key in PAIRED for stage in STAGES)


def side_by_side(raw_rows: list[dict], washed_rows: list[dict]) -> list[dict]:
    """One row per channel with the raw and the washed metrics (``raw sbr``, ``washed sbr`` ...).

    Rows are matched by channel, in the raw rows' (stains) order; a channel missing from one
    stage has empty cells there. ``flags`` and ``sbr`` are the washed ones when present (what
    the plot colours), else the raw ones.

    Examples
    --------
    >>> both = side_by_side([{"channel": "A", "sbr": 2.0, "flags": ["empty"]}],
    ...                     [{"channel": "A", "sbr": 3.0, "flags": []}])
    >>> both[0]["raw sbr"], both[0]["washed sbr"], both[0]["raw flags"], both[0]["flags"]
    (2.0, 3.0, ['empty'], [])
    """
    washed = {row["channel"]: row for row in washed_rows}
    order = [row["channel"] for row in raw_rows] + [c for c in washed if c not in
                                                     {row["channel"] for row in raw_rows}]
    raw = {row["channel"]: row for row in raw_rows}
    out = []
    for channel in order:
        pair = {"raw": raw.get(channel, {}), "washed": washed.get(channel, {})}
        either = pair["washed"] or pair["raw"]
        row = {"channel": channel, "label": either.get("label"), "flags": either.get("flags", []),
               "sbr": either.get("sbr", float("nan"))}
        for stage, source in pair.items():
            for key in PAIRED:
                row[f"{stage} {key}"] = source.get(key)
        out.append(row)
    return out


def measure_rows(roi, recipe, *, stage: str = "raw", data=None, spillover=None) -> list[dict]:
    """Quality rows of an ROI as a run measures them (:func:`plexwash.qc.quality.measure_roi`).

    ``stage="washed"`` measures ``data`` (the washed stack) against the raw ROI, so that
    the rows equal those of the run's ``quality.csv``; ``spillover`` (the studio's
    matrix) feeds the raw stage's ghost model, as in a run.
    """
    from plexwash.qc.quality import measure_roi

    measured = measure_roi(roi, recipe, spillover=spillover, washed=data if stage == "washed" else None,
                           threads=os.cpu_count() or 1)
    return measured.washed_rows if stage == "washed" else measured.raw_rows


def cell_text(value, fmt) -> str:
    """Text of one table cell.

    Examples
    --------
    >>> cell_text(0.0123, "pct"), cell_text(12.345, "{:.3g}"), cell_text(["empty", "low-sbr"], None)
    ('1.23', '12.3', 'empty, low-sbr')
    >>> cell_text(3.0, "{:d}")
    '3'

    """
    if value is None:
        return ""
    if isinstance(value, (list, tuple)):
        return ", ".join(str(v) for v in value)
    if fmt is None:
        return str(value)
    if isinstance(value, float) and not math.isfinite(value):
        return "∞" if value > 0 else "—"
    if fmt == "pct":
        return f"{100 * value:.3g}"
    if fmt == "{:d}":  # counts read back from a quality.csv arrive as floats
        return str(int(value))
    return fmt.format(value)


#: Height of the SBR chart in pixels.
PLOT_HEIGHT = 190


def sbr_chart(rows: list[dict], low_sbr: float, width: int, height: int):
    """The SBR-by-channel bar chart of quality rows, rendered off screen (any thread).

    One bar per channel (side-by-side rows: a grey raw bar left of the washed one), flagged
    channels in the warning colour, a dashed line at the low-SBR threshold, log scale.
    Returns ``(figure, rgba)``: the matplotlib figure and its pixels, ``(height, width, 4)``
    uint8.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width / 100, height / 100), dpi=100, facecolor="#1e2228")
    FigureCanvasAgg(figure)
    ax = figure.add_subplot(111)
    style_axes(ax)
    if rows:
        x = np.arange(len(rows))
        if "washed sbr" in rows[0]:  # side by side: raw bars (grey) left of washed ones
            raw = np.array([_bar_height(r.get("raw sbr")) for r in rows])
            ax.bar(x - 0.2, raw, color=RAW_BAR, width=0.4, label="raw")
            washed = np.array([_bar_height(r.get("washed sbr")) for r in rows])
            colours = [WARN if r.get("washed flags") else ACCENT for r in rows]
            ax.bar(x + 0.2, washed, color=colours, width=0.4, label="washed")
        else:
            sbr = np.array([_bar_height(r["sbr"]) for r in rows])
            colours = [WARN if r["flags"] else ACCENT for r in rows]
            ax.bar(x, sbr, color=colours, width=0.8)
        ax.set_yscale("log")
        ax.axhline(low_sbr, color="#cfd6dd", lw=0.8, ls=(0, (4, 3)))
        ax.set_xticks(x)
        ax.set_xticklabels([r.get("label") or r["channel"] for r in rows], rotation=90, fontsize=6)
        ax.set_xlim(-0.6, len(rows) - 0.4)
    # fixed margins: tight_layout would measure every label
    figure.subplots_adjust(left=0.12, right=0.98, top=0.95, bottom=0.38)
    figure.canvas.draw()
    return figure, np.asarray(figure.canvas.buffer_rgba()).copy()


#: Colour of the raw bars beside the washed ones.
RAW_BAR = "#6b7682"


def _bar_height(sbr) -> float:
    """An SBR as a bar on a log axis (missing or infinite: no bar)."""
    if sbr is None or not math.isfinite(float(sbr)):
        return float("nan")
    return max(float(sbr), 1e-3)


class _NumberItem(QTableWidgetItem):
    """A cell that sorts by its number, not its text."""

    def __init__(self, text: str, number: float):
        super().__init__(text)
        self.number = number

    def __lt__(self, other):
        if isinstance(other, _NumberItem):
            return self.number < other.number
        return super().__lt__(other)


class QualityWidget(StudioWidget):
    """Per-channel SBR, SNR, foreground, saturation, spikes and flags of the current ROI."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(napari_viewer, parent)
        self.rows: list[dict] = []
        self._plot_soon = QTimer(self)  # coalesced: one chart for a burst of fills
        self._plot_soon.setSingleShot(True)
        self._plot_soon.setInterval(0)
        self._plot_soon.timeout.connect(self._plot)
        self.columns = COLUMNS
        self._headers = [c[1] for c in COLUMNS]
        self.shown: tuple[str, str] | None = None  # (stage, source) of the rows in the table
        self._quiet = False
        layout = self.layout()

        top = QHBoxLayout()
        self.stage = QComboBox()
        self.stage.setObjectName("quality_source")
        for stage, source, text in SOURCES:
            self.stage.addItem(text, (stage, source))
        self.stage.setToolTip("measure the ROI as loaded, or after a wash with the studio's recipe; "
                              "or show the run's own quality.csv (a run folder chosen in the Cohort widget)")
        self.stage.currentIndexChanged.connect(self._source_chosen)
        self.measure_button = QPushButton("Measure")
        self.measure_button.clicked.connect(self.measure)
        top.addWidget(self.stage, 1)
        top.addWidget(self.measure_button)
        layout.addWidget(self.caption("Channels"))
        layout.addLayout(top)

        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setObjectName("quality_table")
        self.table.setHorizontalHeaderLabels([c[1] for c in COLUMNS])
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.verticalHeader().setDefaultSectionSize(self.fontMetrics().height() + 6)  # compact rows
        # columns are sized once per fill (resizeColumnsToContents): a ResizeToContents header
        # measures every cell again after each cell set, seconds for a 40-channel table
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Interactive)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setSortingEnabled(True)
        self.table.itemSelectionChanged.connect(self._row_chosen)
        self.table.setMinimumHeight(220)
        layout.addWidget(self.table, 2)

        layout.addWidget(self.caption("SBR by channel"))
        self.figure = sbr_chart([], 1.0, 320, PLOT_HEIGHT)[0]
        self.plot_view = QLabel()
        self.plot_view.setObjectName("sbr_plot")
        self.plot_view.setMinimumHeight(PLOT_HEIGHT)
        self.plot_view.setMinimumWidth(120)
        self.plot_view.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)
        self.plotter = LatestOnly(lambda args: sbr_chart(*args), self._plotted, parent=self)
        layout.addWidget(self.plot_view)
        self.finish_layout()

        self.state.roi_changed.connect(self._roi_changed)
        self.state.quality_changed.connect(self._quality_arrived)
        self.state.run_quality_changed.connect(lambda _folder: self._roi_changed(self.state.roi))
        self._sources_enabled(None)
        if self.state.roi is not None:
            self._roi_changed(self.state.roi)

    # ------------------------------------------------------------------ actions

    @property
    def source(self) -> tuple[str, str]:
        """(stage, source) chosen: ``source`` is ``measure`` or ``run``."""
        return self.stage.currentData()

    def run_rows(self, roi, stage: str) -> list[dict] | None:
        """The run's own quality.csv rows of an ROI (or an ROI id) at a stage, when a run folder
        is known; matched by the ROI's id (its path in the cohort), not its file name."""
        key = roi if isinstance(roi, str) else self.state.roi_key(roi)
        return self.state.run_quality.get(key, {}).get(stage)

    def measure(self):
        """Measure the current ROI at the chosen stage in the background; returns the worker.

        With a "run's quality.csv" entry chosen, the run's rows are shown instead (no worker).
        """
        roi = self.state.roi
        if roi is None:
            self.say("load an ROI in the Cohort widget first", warn=True)
            return None
        stage, source = self.source
        if source == "run":
            self._show_run(roi, stage)
            return None
        recipe, spillover = self.state.recipe, self.state.spillover
        self.say(f"measuring {roi.name} ({stage})…")

        @thread_worker
        def job():
            if stage == "raw":
                return stage, measure_rows(roi, recipe, spillover=spillover)
            from plexwash.qc.quality import measure_roi
            from plexwash.qc.wash import compute, wash

            washed = compute(wash(roi, recipe, spillover=spillover))
            # one engine call measures both stages, the washed one against the raw reference
            measured = measure_roi(roi, recipe, spillover=spillover, washed=washed.data,
                                   threads=os.cpu_count() or 1)
            if stage == "both":
                return stage, side_by_side(measured.raw_rows, measured.washed_rows)
            return stage, measured.washed_rows

        return self.start(job(), on_return=lambda result: self._show(roi, *result))

    def _show_run(self, roi, stage) -> None:
        if stage == "both":
            raw, washed = self.run_rows(roi, "raw"), self.run_rows(roi, "washed")
            rows = None if raw is None and washed is None else side_by_side(raw or [], washed or [])
        else:
            rows = self.run_rows(roi, stage)
        if rows is None:
            self.say(f"the run's quality.csv has no {stage} rows of {roi.name}", warn=True)
            self.show_rows([])
            return
        self._show(roi, stage, rows, source="run")

    def _sources_enabled(self, roi) -> None:
        """Offer the run's entries only for an ROI the run measured."""
        model = self.stage.model()
        for i, (stage, source, _text) in enumerate(SOURCES):
            stages = STAGES if stage == "both" else (stage,)
            enabled = source == "measure" or (roi is not None and any(
                self.run_rows(roi, st) is not None for st in stages))
            model.item(i).setEnabled(enabled)

    def _source_chosen(self, _index) -> None:
        roi = self.state.roi
        if roi is None or self._quiet:
            return
        stage, source = self.source
        if source == "run":
            self._show_run(roi, stage)
        elif stage == "raw" and self.state.roi_key(roi) in self.state.quality:
            self._show(roi, "raw", self.state.quality[self.state.roi_key(roi)])

    def _choose(self, stage: str, source: str) -> None:
        self._quiet = True
        try:
            self.stage.setCurrentIndex(next(i for i, (st, so, _t) in enumerate(SOURCES)
                                            if (st, so) == (stage, source)))
        finally:
            self._quiet = False

    def _roi_changed(self, roi):
        self._sources_enabled(roi)
        if roi is not None and self.run_rows(roi, "washed") is not None and self._is_run_output(roi):
            self._choose("washed", "run")  # a washed ROI of a run: the run's own verdicts
            self._show_run(roi, "washed")
            return
        self._choose("raw", "measure")
        cached = self.state.quality.get(self.state.roi_key(roi)) if roi is not None else None
        if cached is not None:
            self._show(roi, "raw", cached)
            return
        self.show_rows([])
        if roi is not None and self.state.roi_key(roi) in self.state.pending_quality:
            self.say(f"{roi.name}: measuring with the cohort…")  # the Cohort widget delivers it
        elif roi is not None:
            self.measure()

    def _is_run_output(self, roi) -> bool:
        run_dir = self.state.run_dir
        return run_dir is not None and roi.path is not None and Path(roi.path).resolve().is_relative_to(run_dir.resolve())

    def _quality_arrived(self, roi_name):
        roi = self.state.roi
        if roi is not None and self.state.roi_key(roi) == roi_name and not self.rows and self.source == ("raw", "measure"):
            self._show(roi, "raw", self.state.quality[roi_name])

    def _show(self, roi, stage, rows, source: str = "measure"):
        if roi is not self.state.roi:
            return  # the user moved on to another ROI meanwhile
        if stage == "raw" and source == "measure":
            self.state.quality.setdefault(self.state.roi_key(roi), rows)
        self.shown = (stage, source)
        self.show_rows(rows)
        where = " from the run's quality.csv" if source == "run" else ""
        if stage == "both":
            raw = sum(1 for r in rows if r.get("raw flags"))
            washed = sum(1 for r in rows if r.get("washed flags"))
            self.say(f"{roi.name} (raw | washed{where}): {len(rows)} channels, "
                     f"{raw} flagged raw, {washed} flagged washed")
            return
        flagged = sum(1 for r in rows if r["flags"])
        self.say(f"{roi.name} ({stage}{where}): {len(rows)} channels, {flagged} flagged")

    # ------------------------------------------------------------------ display

    def show_rows(self, rows: list[dict]) -> None:
        """Fill the table (in stains order) and the plot with quality rows (side-by-side rows,
        from :func:`side_by_side`, get a raw and a washed column per metric)."""
        self.rows = list(rows)
        both = bool(rows) and "washed sbr" in rows[0]
        columns = BOTH_COLUMNS if both else COLUMNS
        self.columns = columns
        self.table.setSortingEnabled(False)
        self.table.setUpdatesEnabled(False)  # one repaint for the whole table
        self.table.clearContents()
        if self.table.columnCount() != len(columns) or self._headers != [c[1] for c in columns]:
            self._headers = [c[1] for c in columns]
            self.table.setColumnCount(len(columns))
            self.table.setHorizontalHeaderLabels(self._headers)
            for c, (key, _h, _f) in enumerate(columns):
                stage = key.split(" ")[0] if " " in key else ""
                self.table.horizontalHeaderItem(c).setToolTip(f"{stage} stage" if stage else "")
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            for c, (key, _, fmt) in enumerate(columns):
                value = r if key == "position" else row.get(key)
                text = cell_text(value, fmt)
                if fmt is not None and value is not None and not isinstance(value, str):
                    item = _NumberItem(text, float(value))
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                else:
                    item = QTableWidgetItem(text)
                if key.endswith("flags") and value:
                    item.setForeground(qcolor(WARN))
                    item.setToolTip(text)
                item.setData(Qt.ItemDataRole.UserRole, row["channel"])
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
        self.table.sortItems(0, Qt.SortOrder.AscendingOrder)  # stains order, as the plot
        self.table.resizeColumnsToContents()
        self.table.setUpdatesEnabled(True)
        flag_columns = [c for c, (key, _h, _f) in enumerate(columns) if key.endswith("flags")]
        flagged = [r for r in range(len(rows)) if any(self.table.item(r, c).text() for c in flag_columns)]
        if flagged:  # bring the first flagged channel into view (its row; the columns from the left)
            self.table.scrollToItem(self.table.item(flagged[0], 0), QAbstractItemView.ScrollHint.PositionAtCenter)
        self._plot_soon.start()  # the plot in its own turn of the event loop

    def _plot(self):
        """Render the SBR chart in the background (matplotlib's layout and drawing take tenths
        of a second for 40 channels); the GUI thread only shows the finished picture."""
        width = max(self.plot_view.width(), 240)
        height = max(self.plot_view.height(), PLOT_HEIGHT)
        self.plotter.request((list(self.rows), self.state.recipe.quality.low_sbr, width, height))

    def _plotted(self, result) -> None:
        from qtpy.QtGui import QImage, QPixmap

        figure, rgba = result
        self.figure = figure
        height, width = rgba.shape[:2]
        image = QImage(rgba.data, width, height, 4 * width, QImage.Format.Format_RGBA8888)
        self.plot_view.setPixmap(QPixmap.fromImage(image.copy()))

    def busy(self) -> bool:
        return super().busy() or not self.plotter.idle or self._plot_soon.isActive()

    def _row_chosen(self):
        items = self.table.selectedItems()
        if not items:
            return
        channel = items[0].data(Qt.ItemDataRole.UserRole)
        self.state.set_channel(channel)
        roi = self.state.roi
        if roi is not None:
            name = roi.labels[roi.channel_index(channel)]
            if name in self.viewer.layers:
                self.viewer.layers.selection.active = self.viewer.layers[name]
