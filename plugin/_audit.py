"""Audit dock widget: a pair of exclusive markers overlaid (co-positive pixels highlighted),
its audit raw vs washed, the ROI's segmentation composite from a run folder, and the
segmentation roles: chosen per channel, previewed live, saved as a new stain sheet.

Thin: the numbers and images come from :func:`plexwash.qc.audit.audit_pair`,
:func:`plexwash.qc.composite.build_composite` and the run's ``<roi>.composite.ome.tiff``;
the sheet is written by :func:`plexwash.qc.files.write_atomic` after
:func:`plexwash.qc.files.check_output`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from napari.qt.threading import thread_worker
from qtpy.QtWidgets import QComboBox, QGridLayout, QLabel, QPushButton, QWidget

from ._common import PathRow, StudioWidget

#: Layer names and colours of the pair overlay and the composite.
FIRST, SECOND, BOTH = "audit · first", "audit · second", "audit · co-positive"
NUCLEAR, MEMBRANE = "composite · nuclear", "composite · membrane"
COLOURS = {FIRST: "magenta", SECOND: "cyan", BOTH: "yellow", NUCLEAR: "blue", MEMBRANE: "green"}
#: The role chooser's entries: (shown text, stain sheet value).
ROLE_CHOICES = (("none", ""), ("nuclear", "nuclear"), ("membrane", "membrane"))
PREVIEW_NOTE = ("preview: this ROI's pixels as loaded, each channel clipped at this ROI's own "
                "percentiles; a run builds the composites from washed channels clipped at "
                "cohort-wide percentiles")


def sheet_with_roles(roi, roles):
    """The stain sheet of ``roi`` (tags, markers, wash) with the segmentation ``roles``
    (tag -> ``nuclear``, ``membrane`` or ``""``; tags not named keep no role)."""
    from plexwash.qc.io import StainSheet

    return StainSheet(tuple(roi.channels), tuple(roi.labels), tuple(roi.use),
                      roles=tuple(roles.get(tag, "") for tag in roi.channels))


def role_preview(planes, roles, composite) -> np.ndarray:
    """The (2, Y, X) composite of one ROI, each channel clipped at its own percentiles.

    ``planes``: tag -> image of every contributing channel; ``composite``: the recipe's
    :class:`~plexwash.qc.composite.CompositeSettings` (percentiles and combining).
    """
    from plexwash.qc.composite import build_composite

    low, high = composite.low_percentile, composite.high_percentile
    percentiles = {tag: tuple(float(v) for v in np.percentile(planes[tag], [low, high]))
                   for tag in roles}
    return build_composite(planes, roles, percentiles, combine=composite.combine)


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
        layout.addWidget(self.caption("Roles"))
        self.roles_panel = QWidget()
        self.roles_grid = QGridLayout(self.roles_panel)
        self.roles_grid.setContentsMargins(0, 0, 0, 0)
        self.role_boxes: dict[str, QComboBox] = {}
        layout.addWidget(self.roles_panel)
        note = QLabel(PREVIEW_NOTE)
        note.setObjectName("roles_note")
        note.setWordWrap(True)
        layout.addWidget(note)
        self.stains_path = PathRow("new stains.csv", save=True, file_types="Stain sheet (*.csv)",
                                   button="…")
        layout.addWidget(self.stains_path)
        self.save_button = QPushButton("Save stain sheet as…")
        self.save_button.setToolTip("a new stain sheet with these roles (never over the cohort's "
                                    "own stains.csv or another input)")
        self.save_button.clicked.connect(lambda: self.save_stains(self.stains_path.path()))
        layout.addWidget(self.save_button)
        self._preview_token = 0
        self.finish_layout()
        self.state.roi_changed.connect(self._roi_changed)
        if self.state.roi is not None:
            self._roi_changed(self.state.roi)

    def _roi_changed(self, roi) -> None:
        self._fill_roles(roi)
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

    # ------------------------------------------------------------------ roles

    def _fill_roles(self, roi) -> None:
        while self.roles_grid.count():
            item = self.roles_grid.takeAt(0)
            if item.widget() is not None:
                item.widget().deleteLater()
        self.role_boxes = {}
        if roi is None:
            return
        washed = [(tag, label, role) for tag, label, use, role
                  in zip(roi.channels, roi.labels, roi.use, roi.roles, strict=True) if use]
        for row, (tag, label, role) in enumerate(washed):
            box = QComboBox()
            box.setObjectName(f"role_{tag}")
            for text, value in ROLE_CHOICES:
                box.addItem(text, value)
            box.setCurrentIndex([value for _t, value in ROLE_CHOICES].index(role))
            box.currentIndexChanged.connect(lambda _i: self.preview_roles())
            self.roles_grid.addWidget(QLabel(label if label == tag else f"{label} ({tag})"), row, 0)
            self.roles_grid.addWidget(box, row, 1)
            self.role_boxes[tag] = box

    def roles(self) -> dict[str, str]:
        """The chosen role of each washed channel (tag -> ``nuclear``, ``membrane`` or ``""``)."""
        return {tag: box.currentData() for tag, box in self.role_boxes.items()}

    def set_role(self, tag: str, role: str) -> None:
        """Choose ``role`` for the channel ``tag`` (as a click in its chooser does)."""
        box = self.role_boxes[tag]
        box.setCurrentIndex(box.findData(role))

    def _complete_roles(self) -> dict[str, str] | None:
        """The chosen roles when both composites have a channel, else None (said)."""
        chosen = {tag: role for tag, role in self.roles().items() if role}
        missing = [role for _t, role in ROLE_CHOICES[1:] if role not in chosen.values()]
        if missing:
            self.say(f"choose at least one {' and one '.join(missing)} channel", warn=True)
            return None
        return chosen

    def preview_roles(self):
        """Preview the composite of the chosen roles on the current ROI in the background;
        returns the worker (None when the roles are incomplete)."""
        roi = self.state.roi
        chosen = self._complete_roles() if roi is not None else None
        if chosen is None:
            return None
        self._preview_token += 1
        token, state, settings = self._preview_token, self.state, self.state.recipe.composite

        @thread_worker
        def job():
            return role_preview({tag: state.plane(tag) for tag in chosen}, chosen, settings)

        def shown(data):
            if token != self._preview_token or roi is not self.state.roi:
                return  # a later choice or another ROI won
            self._put(NUCLEAR, data[0], contrast=(0.0, 1.0))
            self._put(MEMBRANE, data[1], contrast=(0.0, 1.0))
            self.say(f"composite preview of {roi.name} (this ROI's percentiles)")

        return self.start(job(), on_return=shown)

    def save_stains(self, path) -> Path | None:
        """Write a new stain sheet with the chosen roles at ``path``; None when refused."""
        from plexwash.qc.errors import InputError, OutputError
        from plexwash.qc.files import check_output, write_atomic
        from plexwash.qc.io import stains_text

        roi = self.state.roi
        if roi is None:
            self.say("load an ROI in the Cohort widget first", warn=True)
            return None
        if path is None:
            self.say("choose where to save the stain sheet", warn=True)
            return None
        if self._complete_roles() is None:
            return None
        path = Path(path)
        try:  # never over the cohort's stain sheet, an ROI, or a file plexwash did not write
            check_output(path, self.state.inputs(roi.path), kind="csv")
            write_atomic(path, stains_text(sheet_with_roles(roi, self.roles())))
        except (InputError, OutputError) as exc:
            self.fail(exc)
            return None
        self.stains_path.set_path(path)
        self.say(f"stain sheet saved: {path} (use it for the run)")
        return path
