"""Quality dock widget: per-channel metrics and flags of the current ROI, sortable, with a plot."""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
from napari.qt.threading import thread_worker
from qtpy.QtCore import Qt
from qtpy.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
)

from ._common import ACCENT, WARN, StudioWidget, qcolor, small_figure, style_axes

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
)
STAGES = ("raw", "washed")


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
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setSortingEnabled(True)
        self.table.itemSelectionChanged.connect(self._row_chosen)
        self.table.setMinimumHeight(220)
        layout.addWidget(self.table, 2)

        layout.addWidget(self.caption("SBR by channel"))
        self.figure, self.canvas = small_figure()
        layout.addWidget(self.canvas, 1)
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

    def run_rows(self, roi_name: str, stage: str) -> list[dict] | None:
        """The run's own quality.csv rows of an ROI at a stage, when a run folder is known."""
        return self.state.run_quality.get(roi_name, {}).get(stage)

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
            from plexwash.qc.wash import compute, wash

            washed = compute(wash(roi, recipe, spillover=spillover))
            return stage, measure_rows(roi, recipe, stage="washed", data=washed.data, spillover=spillover)

        return self.start(job(), on_return=lambda result: self._show(roi, *result))

    def _show_run(self, roi, stage) -> None:
        rows = self.run_rows(roi.name, stage)
        if rows is None:
            self.say(f"the run's quality.csv has no {stage} rows of {roi.name}", warn=True)
            self.show_rows([])
            return
        self._show(roi, stage, rows, source="run")

    def _sources_enabled(self, roi) -> None:
        """Offer the run's entries only for an ROI the run measured."""
        model = self.stage.model()
        for i, (stage, source, _text) in enumerate(SOURCES):
            enabled = source == "measure" or (roi is not None and self.run_rows(roi.name, stage) is not None)
            model.item(i).setEnabled(enabled)

    def _source_chosen(self, _index) -> None:
        roi = self.state.roi
        if roi is None or self._quiet:
            return
        stage, source = self.source
        if source == "run":
            self._show_run(roi, stage)
        elif stage == "raw" and roi.name in self.state.quality:
            self._show(roi, "raw", self.state.quality[roi.name])

    def _choose(self, stage: str, source: str) -> None:
        self._quiet = True
        try:
            self.stage.setCurrentIndex(next(i for i, (st, so, _t) in enumerate(SOURCES)
                                            if (st, so) == (stage, source)))
        finally:
            self._quiet = False

    def _roi_changed(self, roi):
        self._sources_enabled(roi)
        if roi is not None and self.run_rows(roi.name, "washed") is not None and self._is_run_output(roi):
            self._choose("washed", "run")  # a washed ROI of a run: the run's own verdicts
            self._show_run(roi, "washed")
            return
        self._choose("raw", "measure")
        cached = self.state.quality.get(roi.name) if roi is not None else None
        if cached is not None:
            self._show(roi, "raw", cached)
            return
        self.show_rows([])
        if roi is not None and roi.name in self.state.pending_quality:
            self.say(f"{roi.name}: measuring with the cohort…")  # the Cohort widget delivers it
        elif roi is not None:
            self.measure()

    def _is_run_output(self, roi) -> bool:
        run_dir = self.state.run_dir
        return run_dir is not None and roi.path is not None and Path(roi.path).parent.resolve() == run_dir.resolve()

    def _quality_arrived(self, roi_name):
        roi = self.state.roi
        if roi is not None and roi.name == roi_name and not self.rows and self.source == ("raw", "measure"):
            self._show(roi, "raw", self.state.quality[roi_name])

    def _show(self, roi, stage, rows, source: str = "measure"):
        if roi is not self.state.roi:
            return  # the user moved on to another ROI meanwhile
        if stage == "raw" and source == "measure":
            self.state.quality.setdefault(roi.name, rows)
        self.shown = (stage, source)
        self.show_rows(rows)
        flagged = sum(1 for r in rows if r["flags"])
        where = " from the run's quality.csv" if source == "run" else ""
        self.say(f"{roi.name} ({stage}{where}): {len(rows)} channels, {flagged} flagged")

    # ------------------------------------------------------------------ display

    def show_rows(self, rows: list[dict]) -> None:
        """Fill the table (in stains order) and the plot with quality rows."""
        self.rows = list(rows)
        self.table.setSortingEnabled(False)
        self.table.clearContents()
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            for c, (key, _, fmt) in enumerate(COLUMNS):
                value = r if key == "position" else row.get(key)
                text = cell_text(value, fmt)
                if fmt is not None and value is not None and not isinstance(value, str):
                    item = _NumberItem(text, float(value))
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                else:
                    item = QTableWidgetItem(text)
                if key == "flags" and value:
                    item.setForeground(qcolor(WARN))
                    item.setToolTip(text)
                item.setData(Qt.ItemDataRole.UserRole, row["channel"])
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
        self.table.sortItems(0, Qt.SortOrder.AscendingOrder)  # stains order, as the plot
        flags = [c[0] for c in COLUMNS].index("flags")
        flagged = [r for r in range(len(rows)) if self.table.item(r, flags).text()]
        if flagged:  # bring the first flagged channel into view (its row; the columns from the left)
            self.table.scrollToItem(self.table.item(flagged[0], 0), QAbstractItemView.ScrollHint.PositionAtCenter)
        self._plot()

    def _plot(self):
        ax = self.figure.axes[0]
        ax.clear()
        style_axes(ax)
        if self.rows:
            sbr = np.array([max(float(r["sbr"]), 1e-3) if math.isfinite(r["sbr"]) else np.nan
                            for r in self.rows])
            colours = [WARN if r["flags"] else ACCENT for r in self.rows]
            x = np.arange(len(self.rows))
            ax.bar(x, sbr, color=colours, width=0.8)
            ax.set_yscale("log")
            low_sbr = self.state.recipe.quality.low_sbr
            ax.axhline(low_sbr, color="#cfd6dd", lw=0.8, ls=(0, (4, 3)))
            ax.set_xticks(x)
            ax.set_xticklabels([r.get("label") or r["channel"] for r in self.rows], rotation=90,
                               fontsize=6)
            ax.set_xlim(-0.6, len(self.rows) - 0.4)
        # fixed margins: tight_layout measures every label (a few hundred ms on the GUI thread)
        self.figure.subplots_adjust(left=0.12, right=0.98, top=0.95, bottom=0.38)
        self.canvas.draw_idle()

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
