"""Quality dock widget: per-channel metrics and flags of the current ROI, sortable, with a plot."""

from __future__ import annotations

import math
import os

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

#: Table columns: (row key, header, number format or None for text).
COLUMNS = (
    ("channel", "channel", None),
    ("label", "label", None),
    ("sbr", "SBR", "{:.3g}"),
    ("snr", "SNR", "{:.3g}"),
    ("foreground_fraction", "fg %", "pct"),
    ("saturated_fraction", "sat %", "pct"),
    ("spikes", "spikes", "{:d}"),
    ("flags", "flags", None),
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
        layout = self.layout()

        top = QHBoxLayout()
        self.stage = QComboBox()
        self.stage.addItems(["raw", "washed (current recipe)"])
        self.stage.setToolTip("measure the ROI as acquired, or after a wash with the studio's recipe")
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
        if self.state.roi is not None:
            self._roi_changed(self.state.roi)

    # ------------------------------------------------------------------ actions

    def measure(self):
        """Measure the current ROI at the chosen stage in the background; returns the worker."""
        roi = self.state.roi
        if roi is None:
            self.say("load an ROI in the Cohort widget first", warn=True)
            return None
        stage = "washed" if self.stage.currentIndex() == 1 else "raw"
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

    def _roi_changed(self, roi):
        cached = self.state.quality.get(roi.name) if roi is not None else None
        self.stage.setCurrentIndex(0)
        if cached is not None:
            self._show(roi, "raw", cached)
            return
        self.show_rows([])
        if roi is not None and roi.name in self.state.pending_quality:
            self.say(f"{roi.name}: measuring with the cohort…")  # the Cohort widget delivers it
        else:
            self.measure()

    def _quality_arrived(self, roi_name):
        roi = self.state.roi
        if roi is not None and roi.name == roi_name and not self.rows and self.stage.currentIndex() == 0:
            self._show(roi, "raw", self.state.quality[roi_name])

    def _show(self, roi, stage, rows):
        if roi is not self.state.roi:
            return  # the user moved on to another ROI meanwhile
        if stage == "raw":
            self.state.quality.setdefault(roi.name, rows)
        self.show_rows(rows)
        flagged = sum(1 for r in rows if r["flags"])
        self.say(f"{roi.name} ({stage}): {len(rows)} channels, {flagged} flagged")

    # ------------------------------------------------------------------ display

    def show_rows(self, rows: list[dict]) -> None:
        """Fill the table and the plot with quality rows."""
        self.rows = list(rows)
        self.table.setSortingEnabled(False)
        self.table.clearContents()
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            for c, (key, _, fmt) in enumerate(COLUMNS):
                value = row.get(key)
                text = cell_text(value, fmt)
                if fmt is not None and value is not None:
                    item = _NumberItem(text, float(value))
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                else:
                    item = QTableWidgetItem(text)
                if key == "flags" and value:
                    item.setForeground(qcolor(WARN))
                item.setData(Qt.ItemDataRole.UserRole, row["channel"])
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
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
        self.figure.tight_layout(pad=0.4)
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
