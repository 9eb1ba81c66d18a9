"""Small pieces shared by the dock widgets: path rows, a status line, settings forms, workers."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

from qtpy.QtCore import Qt, Signal
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QScrollArea,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from ._state import studio_state

#: Accent of the studio's own widgets (status lines, captions).
ACCENT = "#5fd3a6"
WARN = "#ffb454"


class StudioWidget(QWidget):
    """Base of the dock widgets: the viewer, the shared state, a caption style and a status line.

    The widget's content scrolls (a dock shorter than its content shows a scroll bar instead
    of squeezing lists to a few rows); the status line stays below it, always visible.
    :meth:`layout` is the content's layout.
    """

    def __init__(self, napari_viewer, parent=None):
        super().__init__(parent)
        self.viewer = napari_viewer
        self.state = studio_state(napari_viewer)
        self._workers = set()
        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.setSpacing(2)
        self.body = QWidget()
        self.body.setObjectName("plexwash_body")
        self._body_layout = QVBoxLayout(self.body)
        self._body_layout.setContentsMargins(6, 6, 6, 6)
        self._body_layout.setSpacing(6)
        self.scroll = QScrollArea()
        self.scroll.setObjectName("plexwash_scroll")
        self.scroll.setWidgetResizable(True)
        self.scroll.setFrameShape(QScrollArea.Shape.NoFrame)
        self.scroll.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.scroll.setWidget(self.body)
        outer.addWidget(self.scroll, 1)
        self._outer = outer
        self.status = QLabel("")
        self.status.setWordWrap(True)
        self.status.setObjectName("plexwash_status")
        self.status.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)

    def caption(self, text: str) -> QLabel:
        label = QLabel(text.upper())
        label.setStyleSheet(f"color: {ACCENT}; font-weight: bold; letter-spacing: 1px;")
        return label

    def layout(self):  # the scrolled content's layout (where subclasses add their rows)
        return self._body_layout

    def finish_layout(self) -> None:
        """Call last in ``__init__``: puts the status line at the bottom, outside the scroll."""
        self.layout().addStretch(1)
        self.status.setContentsMargins(6, 0, 6, 4)
        self._outer.addWidget(self.status)

    def say(self, text: str, *, warn: bool = False) -> None:
        self.status.setStyleSheet(f"color: {WARN};" if warn else "")
        self.status.setText(text)

    def fail(self, exc: BaseException) -> None:
        """Show an error in the status line (InputError as its one line)."""
        self.say(f"error: {exc}", warn=True)

    def alive(self) -> bool:
        """False once Qt has deleted this widget (e.g. its viewer window closed)."""
        return is_alive(self)

    def start(self, worker, *, on_return=None, on_yield=None, on_error=None):
        """Start a napari worker, keeping it referenced until it finishes.

        Handlers run on the GUI thread, and not at all once the widget is gone.
        """
        self._workers.add(worker)
        if on_return is not None:
            worker.returned.connect(self.guarded(on_return))
        if on_yield is not None:
            worker.yielded.connect(self.guarded(on_yield))
        worker.errored.connect(self.guarded(on_error or self.fail))
        worker.finished.connect(lambda: self._workers.discard(worker))
        # connected before start, so it can't be missed however fast the worker is; it runs
        # after the handlers above (Qt calls slots in connection order)
        worker.finished.connect(lambda: setattr(worker, "finished_handled", True))
        worker.start()
        return worker

    def guarded(self, handler):
        def run(*args):
            if self.alive():
                handler(*args)

        return run

    def busy(self) -> bool:
        return bool(self._workers)

    def closeEvent(self, event):  # stop background work with the widget
        for worker in list(self._workers):
            worker.quit()
        super().closeEvent(event)


def is_alive(qobject) -> bool:
    """Whether the C++ side of a Qt object still exists (works with every Qt binding)."""
    try:
        qobject.objectName()
    except RuntimeError:
        return False
    return True


class PathRow(QWidget):
    """A line edit with a browse button for a file or folder."""

    changed = Signal(str)

    def __init__(self, placeholder: str, *, folder: bool = False, save: bool = False,
                 file_types: str = "", button: str = "Browse…", parent=None):
        super().__init__(parent)
        self._folder, self._save, self._file_types = folder, save, file_types
        layout = QHBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        self.edit = QLineEdit()
        self.edit.setPlaceholderText(placeholder)
        self.edit.editingFinished.connect(lambda: self.changed.emit(self.edit.text()))
        self.button = QPushButton(button)
        self.button.clicked.connect(self._browse)
        layout.addWidget(self.edit, 1)
        layout.addWidget(self.button)

    def _browse(self):
        start = self.edit.text() or str(Path.cwd())
        if self._folder:
            chosen = QFileDialog.getExistingDirectory(self, "Choose a folder", start)
        elif self._save:
            chosen, _ = QFileDialog.getSaveFileName(self, "Save as", start, self._file_types)
        else:
            chosen, _ = QFileDialog.getOpenFileName(self, "Open", start, self._file_types)
        if chosen:
            self.edit.setText(chosen)
            self.changed.emit(chosen)

    def path(self) -> Path | None:
        text = self.edit.text().strip()
        return Path(text).expanduser() if text else None

    def set_path(self, path) -> None:
        self.edit.setText("" if path is None else str(path))


class SettingsForm(QWidget):
    """Editors for one settings dataclass, built from its field metadata (doc, range).

    ``changed`` carries ``(field name, new value)``. :meth:`set_values` updates the
    editors without emitting.
    """

    changed = Signal(str, object)

    def __init__(self, settings_class: type, *, skip: tuple[str, ...] = (), parent=None):
        super().__init__(parent)
        self.settings_class = settings_class
        self.editors: dict[str, QWidget] = {}
        self._quiet = False
        form = QFormLayout(self)
        form.setContentsMargins(0, 0, 0, 0)
        for field in dataclasses.fields(settings_class):
            if field.name in skip:
                continue
            editor = self._editor(field)
            editor.setToolTip(_tooltip(field))
            editor.setObjectName(f"setting_{field.name}")
            self.editors[field.name] = editor
            form.addRow(field.name.replace("_", " "), editor)

    def _editor(self, field: dataclasses.Field) -> QWidget:
        meta, default = field.metadata, field.default
        name = field.name
        if isinstance(default, bool):
            box = QCheckBox()
            box.setChecked(default)
            box.toggled.connect(lambda v: self._emit(name, bool(v)))
            return box
        if isinstance(default, str):
            combo = QComboBox()
            combo.addItems(list(meta.get("choices") or [default]))
            combo.setCurrentText(default)
            combo.currentTextChanged.connect(lambda v: self._emit(name, str(v)))
            return combo
        integer = isinstance(default, int)
        decimals = 0 if integer else _decimals(default, meta.get("low"))
        low, high = _editor_range(meta, integer=integer, decimals=decimals)
        if integer:
            spin = QSpinBox()
            spin.setRange(int(low), int(high))
            spin.setValue(default)
            spin.valueChanged.connect(lambda v: self._emit(name, int(v)))
            return spin
        spin = QDoubleSpinBox()
        spin.setDecimals(decimals)
        spin.setRange(low, high)
        spin.setSingleStep(_step(default))
        spin.setValue(default)
        spin.setKeyboardTracking(False)
        spin.valueChanged.connect(lambda v: self._emit(name, float(v)))
        return spin

    def _emit(self, name, value):
        if not self._quiet:
            self.changed.emit(name, value)

    def set_values(self, settings) -> None:
        self._quiet = True
        try:
            for name, editor in self.editors.items():
                value = getattr(settings, name)
                if isinstance(editor, QCheckBox):
                    editor.setChecked(bool(value))
                elif isinstance(editor, QComboBox):
                    editor.setCurrentText(str(value))
                else:
                    editor.setValue(value)
        finally:
            self._quiet = False

    def mark(self, own: dict) -> None:
        """Show which settings are this channel's own: ``{name: global value}`` rows in the accent
        colour, bold, with the global value in the tooltip; every other row plain."""
        form = self.layout()
        for name, editor in self.editors.items():
            label = form.labelForField(editor)
            if label is None:
                continue
            style, tip = ((f"color: {ACCENT}; font-weight: bold;", f"this channel's own value; the global one is "
                           f"{own[name]!r}") if name in own else ("", ""))
            if label.styleSheet() != style:  # each style set re-polishes the label: on every channel
                label.setStyleSheet(style)  # click, only the rows that change
            if label.toolTip() != tip:
                label.setToolTip(tip)

    def values(self) -> dict:
        out = {}
        for name, editor in self.editors.items():
            if isinstance(editor, QCheckBox):
                out[name] = editor.isChecked()
            elif isinstance(editor, QComboBox):
                out[name] = editor.currentText()
            else:
                out[name] = editor.value()
        return out


def _tooltip(field: dataclasses.Field) -> str:
    from plexwash.qc.settings import describe_range

    meta = field.metadata
    return f"{meta.get('doc', '')}\nallowed: {describe_range(meta)}; default {field.default!r}"


def _editor_range(meta: dict, *, integer: bool, decimals: int = 0) -> tuple[float, float]:
    """Editor bounds from a setting's range; open bounds step one editor unit inside."""
    low = meta.get("low")
    high = meta.get("high")
    low = -1e9 if low is None else float(low)
    high = 1e9 if high is None else float(high)
    unit = 1.0 if integer else 10.0 ** -decimals
    if meta.get("low_open"):
        low += unit
    if meta.get("high_open"):
        high -= unit
    return low, high


def _decimals(default: float, low) -> int:
    """Enough decimals to show small defaults such as 1e-6 (QDoubleSpinBox rounds to them).

    Examples
    --------
    >>> _decimals(1e-6, 0.0), _decimals(5.0, 1.0)
    (9, 3)
    """
    values = [abs(v) for v in (default, low) if v]
    smallest = min(values + [1.0])
    return int(min(12, max(3, -math.floor(math.log10(smallest)) + 3)))


def _step(default: float) -> float:
    if default == 0:
        return 1.0
    return 10 ** math.floor(math.log10(abs(default)))


def qcolor(hexcode: str):
    from qtpy.QtGui import QColor

    return QColor(hexcode)


def small_figure(height: float = 1.9):
    """A compact matplotlib figure on a Qt canvas, in the studio's dark look."""
    from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(3.2, height), dpi=100, facecolor="#1e2228")
    figure.add_subplot(111)
    canvas = FigureCanvasQTAgg(figure)
    canvas.setMinimumHeight(int(height * 80))
    style_axes(figure.axes[0])
    return figure, canvas


def style_axes(ax):
    ax.set_facecolor("#1e2228")
    for spine in ("top", "right"):
        ax.spines[spine].set_visible(False)
    for spine in ("left", "bottom"):
        ax.spines[spine].set_color("#8a949e")
    ax.tick_params(colors="#cfd6dd", labelsize=7)
