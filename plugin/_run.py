"""Run dock widget: wash the whole cohort in the background, with progress and cancel."""

from __future__ import annotations

import ctypes
import threading
from pathlib import Path

from napari.qt.threading import thread_worker
from qtpy.QtCore import QTimer
from qtpy.QtWidgets import (
    QButtonGroup,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QRadioButton,
    QSpinBox,
)

from ._common import PathRow, StudioWidget
from ._layers import find_stains

#: How often the ledger is read for progress while a run goes.
POLL_MS = 250


class Cancelled:
    """What a cancelled run returns instead of a summary."""

    def __repr__(self):
        return "Cancelled()"


#: Seconds a cancelled call may take to stop by itself before it is interrupted.
INTERRUPT_GRACE_S = 2.0


class CancellableCall:
    """Run a blocking call in a worker thread that :meth:`cancel` can interrupt.

    Cancelling raises ``KeyboardInterrupt`` inside the call's thread, exactly what Ctrl-C
    does to ``plexwash run``: the run stops at its next Python step, records nothing for
    the ROIs in flight, removes their temporary files and re-raises; the call then
    returns :class:`Cancelled`. The interrupt is sent at most once and only while the
    call runs, so it can never reach other work on the same thread afterwards.
    """

    def __init__(self):
        self._lock = threading.Lock()
        self._thread: int | None = None
        self.cancelled = False
        #: Also set on cancel: ``run_cohort(cancel=...)`` stops after the ROI in flight even
        #: when CPython swallows the asynchronous interrupt (e.g. inside a finaliser).
        self.event = threading.Event()

    def __call__(self, function, *args, **kwargs):
        try:
            with self._lock:
                if self.cancelled:
                    return Cancelled()
                self._thread = threading.get_ident()
            try:
                return function(*args, **kwargs)
            finally:
                self._disarm()
        except KeyboardInterrupt:
            self._disarm()
            return Cancelled()

    def _disarm(self):
        with self._lock:
            if self._thread is not None:
                _async_raise(self._thread, None)  # drop an interrupt not yet delivered
            self._thread = None

    def cancel(self) -> bool:
        """Interrupt the running call; False when nothing runs or it was already cancelled."""
        with self._lock:
            if self.cancelled:
                return False
            self.cancelled = True
            self.event.set()
            if self._thread is None:
                return False
        # The run stops by itself at its next ROI (the event); the interrupt only follows
        # after a grace period, for an ROI that takes long. Sent at once it could land in
        # the middle of an import at the start of the call and leave it stuck.
        timer = threading.Timer(INTERRUPT_GRACE_S, self._interrupt)
        timer.daemon = True
        timer.start()
        return True

    def _interrupt(self):
        with self._lock:
            if self._thread is not None:
                _async_raise(self._thread, KeyboardInterrupt)


def _async_raise(thread_id: int, exc_type) -> None:
    """Raise ``exc_type`` in a Python thread at its next bytecode (None clears a pending one)."""
    target = ctypes.py_object(exc_type) if exc_type is not None else None
    ctypes.pythonapi.PyThreadState_SetAsyncExc(ctypes.c_ulong(thread_id), target)


class RunWidget(StudioWidget):
    """Pick cohort, output folder and recipe; wash every ROI in the background; cancel."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(napari_viewer, parent)
        self.call: CancellableCall | None = None
        self.summary = None
        self._bar = None
        self._ledger_start = 0
        self._done_shown = 0
        self._poll = QTimer(self)
        self._poll.setInterval(POLL_MS)
        self._poll.timeout.connect(self._update_progress)
        layout = self.layout()

        layout.addWidget(self.caption("Cohort"))
        self.cohort = PathRow("cohort folder", folder=True)
        layout.addWidget(self.cohort)
        layout.addWidget(self.caption("Output"))
        self.output = PathRow("run output folder (rerun into it to resume)", folder=True)
        layout.addWidget(self.output)

        layout.addWidget(self.caption("Recipe"))
        self.recipe_choice = QButtonGroup(self)
        self.use_studio = QRadioButton("the studio's settings (as tuned in Speckle)")
        self.use_file = QRadioButton("a recipe file")
        self.use_studio.setChecked(True)
        for button in (self.use_studio, self.use_file):
            self.recipe_choice.addButton(button)
            layout.addWidget(button)
        self.recipe_file = PathRow("recipe.toml", file_types="Recipe (*.toml)")
        self.recipe_file.changed.connect(lambda _t: self.use_file.setChecked(True))
        layout.addWidget(self.recipe_file)
        self.spill_note = QLabel("")
        self.spill_note.setWordWrap(True)
        layout.addWidget(self.spill_note)

        row = QHBoxLayout()
        row.addWidget(QLabel("worker processes"))
        self.workers = QSpinBox()
        self.workers.setRange(0, 64)
        self.workers.setSpecialValueText("none (this process)")
        self.workers.setToolTip("0: wash here, one ROI after the other; N: a local cluster of N processes")
        row.addWidget(self.workers, 1)
        layout.addLayout(row)

        buttons = QHBoxLayout()
        self.run_button = QPushButton("Run")
        self.run_button.setObjectName("run_button")
        self.run_button.clicked.connect(self.run)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setObjectName("cancel_button")
        self.cancel_button.setEnabled(False)
        self.cancel_button.clicked.connect(self.cancel)
        buttons.addWidget(self.run_button)
        buttons.addWidget(self.cancel_button)
        layout.addLayout(buttons)
        self.finish_layout()

        self.state.cohort_changed.connect(self._cohort_changed)
        self.state.spillover_changed.connect(lambda _m: self._spill_text())
        if self.state.cohort is not None:
            self._cohort_changed(self.state.cohort)
        self._spill_text()

    def _cohort_changed(self, folder):
        self.cohort.set_path(folder)
        if self.output.path() is None and folder is not None:
            self.output.set_path(Path(folder).parent / f"{Path(folder).name}_washed")

    def _spill_text(self):
        matrix = self.state.spillover
        if matrix is None:
            self.spill_note.setText("spillover: as the recipe says (none loaded in the studio)")
        else:
            self.spill_note.setText(f"spillover: the studio's matrix ({len(matrix.channels)} channels)")

    # ------------------------------------------------------------------ run

    def run(self):
        """Start the run in the background; returns the worker (None when inputs are missing)."""
        from plexwash.qc import load_recipe
        from plexwash.qc.errors import InputError
        from plexwash.qc.io import list_cohort
        from plexwash.qc.run import read_ledger, run_cohort

        if self.call is not None:
            self.say("a run is already going", warn=True)
            return None
        cohort, out = self.cohort.path(), self.output.path()
        if cohort is None or out is None:
            self.say("choose the cohort and the output folder", warn=True)
            return None
        try:
            rois = list_cohort(cohort)
            recipe = self.state.recipe if self.use_studio.isChecked() else load_recipe(self.recipe_file.path())
        except InputError as exc:
            self.fail(exc)
            return None
        stains = find_stains(rois[0])
        workers = self.workers.value() or None
        spillover = self.state.spillover
        call = CancellableCall()
        self.call = call
        self._ledger_start = len(read_ledger(out))
        self._done_shown = 0
        self._open_bar(len(rois))

        @thread_worker
        def job():
            return call(run_cohort, cohort, out, recipe=recipe, spillover=spillover, stains=stains,
                        workers=workers, progress=False, cancel=call.event)

        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.say(f"washing {len(rois)} ROIs into {out}…")
        worker = job()
        worker.finished.connect(self._finished)
        self._poll.start()
        return self.start(worker, on_return=lambda result: self._returned(out, result),
                          on_error=self._errored)

    def cancel(self) -> None:
        """Stop the run: ROIs in flight are dropped (a rerun redoes them), finished ones stay."""
        if self.call is not None and self.call.cancel():
            self.cancel_button.setEnabled(False)
            self.say("cancelling: stopping after the current step…", warn=True)

    def _open_bar(self, total: int):
        from napari.utils import progress

        self._close_bar()
        self._bar = progress(total=total, desc="plexwash run")

    def _close_bar(self):
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def _update_progress(self):
        from plexwash.qc.run import read_ledger

        out, bar = self.output.path(), self._bar
        if bar is None or out is None:
            return
        records = read_ledger(out)[self._ledger_start:]
        new = len(records) - self._done_shown
        if new > 0:
            self._done_shown = len(records)
            last = records[-1]
            bar.set_description(f"plexwash run: {last['roi']} {last['status']}")
            bar.update(new)  # may process events (and so close the bar): keep it last

    def _returned(self, out, result):
        self._update_progress()
        if isinstance(result, Cancelled):
            self.say("run cancelled; ROIs finished so far are kept (run again to resume)", warn=True)
            return
        self.summary = result
        self.state.run_dir = Path(out)
        text = f"run finished: {result.done} done, {result.skipped} skipped, {result.failed} failed"
        if result.failed:
            text += f" ({', '.join(result.failed_rois)}; see ledger.jsonl)"
        self.say(text, warn=bool(result.failed))
        self.state.run_finished.emit(result)

    def _errored(self, exc):
        self.fail(exc)

    def _finished(self):
        self._poll.stop()
        self._close_bar()
        self.call = None
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    def closeEvent(self, event):
        if self.call is not None:
            self.call.cancel()
        super().closeEvent(event)
