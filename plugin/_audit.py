"""Audit dock widget: a pair of exclusive markers overlaid (co-positive pixels highlighted),
its audit raw vs washed, and the ROI's segmentation composite from a run folder.

Thin: the numbers and images come from :func:`plexwash.qc.audit.audit_pair` and the
run's ``<roi>.composite.ome.tiff``; nothing is computed here.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from napari.qt.threading import thread_worker
from qtpy.QtWidgets import QComboBox, QGridLayout, QLabel, QPushButton

from ._common import StudioWidget

#: Layer names and colours of the pair overlay and the composite.
FIRST, SECOND, BOTH = "audit · first", "audit · second", "audit · co-positive"
NUCLEAR, MEMBRANE = "composite · nuclear", "composite · membrane"
COLOURS = {FIRST: "magenta", SECOND: "cyan", BOTH: "yellow", NUCLEAR: "blue", MEMBRANE: "green"}


def rows_text(rows) -> str:
    """One line per stage of a pair's audit rows.

    Examples
    --------
    >>> rows_text([{"stage": "raw", "co_positive": 0.85, "expected": 0.3, "flags": ["above-chance"]}])
    'raw: co-positive 0.850, chance 0.300 (above-chance)'
    """
    lines = []
    for r in rows:
        co = "–" if r["co_positive"] is None else f"{r['co_positive']:.3f}"
        chance = "–" if r["expected"] is None else f"{r['expected']:.3f}"
        lines.append(f"{r['stage']}: co-positive {co}, chance {chance} ({', '.join(r['flags']) or 'ok'})")
    return "\n".join(lines)


class AuditWidget(StudioWidget):
    """Pick two markers, see them overlaid with their co-positive pixels, read the audit."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(napari_viewer, parent)
        layout = self.layout()
        layout.addWidget(self.caption("Exclusive pair"))
        grid = QGridLayout()
        self.first, self.second = QComboBox(), QComboBox()
        self.first.setObjectName("audit_first")
        self.second.setObjectName("audit_second")
        grid.addWidget(QLabel("first"), 0, 0)
        grid.addWidget(self.first, 0, 1)
        grid.addWidget(QLabel("second"), 1, 0)
        grid.addWidget(self.second, 1, 1)
        layout.addLayout(grid)
        self.audit_button = QPushButton("Audit pair")
        self.audit_button.setToolTip("wash the two channels with the studio's recipe and show where "
                                     "both are positive (yellow)")
        self.audit_button.clicked.connect(self.audit)
        layout.addWidget(self.audit_button)
        self.result = QLabel("")
        self.result.setObjectName("audit_result")
        self.result.setWordWrap(True)
        layout.addWidget(self.result)
        layout.addWidget(self.caption("Composite"))
        self.composite_button = QPushButton("Show composite")
        self.composite_button.setToolTip("the ROI's <roi>.composite.ome.tiff from the run folder")
        self.composite_button.clicked.connect(self.show_composite)
        layout.addWidget(self.composite_button)
        self.finish_layout()
        self.state.roi_changed.connect(self._roi_changed)
        if self.state.roi is not None:
            self._roi_changed(self.state.roi)

    def _roi_changed(self, roi) -> None:
        for box in (self.first, self.second):
            box.clear()
            if roi is not None:
                for tag, label in zip(roi.channels, roi.labels, strict=True):
                    box.addItem(label if label == tag else f"{label} ({tag})", tag)
        pairs = self.state.recipe.audit.exclusive
        if roi is not None and pairs:  # the recipe's first pair, when this ROI has it
            for box, name in zip((self.first, self.second), pairs[0], strict=True):
                for i, (tag, label) in enumerate(zip(roi.channels, roi.labels, strict=True)):
                    if name in (tag, label):
                        box.setCurrentIndex(i)
        elif roi is not None and len(roi.channels) > 1:
            self.second.setCurrentIndex(1)

    def audit(self):
        """Audit the chosen pair of the current ROI in the background; returns the worker."""
        from plexwash.qc.audit import audit_pair

        roi = self.state.roi
        if roi is None:
            self.say("load an ROI in the Cohort widget first", warn=True)
            return None
        first, second = self.first.currentData(), self.second.currentData()
        recipe, spillover = self.state.recipe, self.state.spillover
        self.say(f"auditing {first} / {second} of {roi.name}…")

        @thread_worker
        def job():
            return audit_pair(roi, recipe, first, second, spillover=spillover)

        return self.start(job(), on_return=lambda result: self._show_pair(roi, result))

    def _show_pair(self, roi, result) -> None:
        if roi is not self.state.roi:
            return
        codes = result["overlay"]
        self._put(FIRST, result["first"])
        self._put(SECOND, result["second"])
        self._put(BOTH, (codes == 3).astype(np.float32), contrast=(0.0, 1.0))
        self.result.setText(rows_text(result["rows"]))
        flagged = [f for r in result["rows"] for f in r["flags"] if r["stage"] == "washed"]
        self.say(f"{roi.name}: {int((codes == 3).sum())} co-positive pixels after the wash"
                 + (f" ({', '.join(flagged)})" if flagged else ""), warn="crosstalk-left" in flagged)

    def composite_path(self) -> Path | None:
        """The current ROI's composite in the run folder (None when there is none)."""
        from plexwash.qc.composite import composite_name

        roi, run_dir = self.state.roi, self.state.run_dir
        if roi is None or run_dir is None:
            return None
        path = Path(run_dir) / composite_name(roi.name)
        return path if path.is_file() else None

    def show_composite(self) -> bool:
        """Add the current ROI's composite as two layers; False when the run has none."""
        from plexwash.qc import read_roi

        path = self.composite_path()
        if path is None:
            self.say("no composite: run the cohort with roles in the stain sheet "
                     "(role column: nuclear, membrane) and choose its run folder", warn=True)
            return False
        data = np.asarray(read_roi(path).data)
        self._put(NUCLEAR, data[0], contrast=(0.0, 1.0))
        self._put(MEMBRANE, data[1], contrast=(0.0, 1.0))
        self.say(f"composite of {self.state.roi.name} ({path.name})")
        return True

    def _put(self, name: str, data, contrast=None) -> None:
        """Show ``data`` in the layer ``name`` (reused when it exists), additive blending."""
        if name in self.viewer.layers:
            layer = self.viewer.layers[name]
            layer.data = data
        else:
            layer = self.viewer.add_image(data, name=name, colormap=COLOURS[name], blending="additive")
        if contrast is not None:
            layer.contrast_limits = contrast
        else:
            layer.reset_contrast_limits()
