"""Latest-only background computation: coalesce bursts of requests, drop stale results.

Used by the live previews. At most one computation runs at a time (two would only share
the same cores); a request made while one runs waits, and only the newest waiting request
is started when the running one ends. A result is delivered only when no newer request
was made after it was asked for, so the canvas never steps back to an older setting.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from napari.qt.threading import create_worker
from qtpy.QtCore import QObject, QTimer, Signal

from ._common import is_alive


class LatestOnly(QObject):
    """Run ``compute(payload)`` off the GUI thread and hand the newest result to ``deliver``.

    Parameters
    ----------
    compute : callable
        ``payload -> result``; runs in a napari worker thread.
    deliver : callable
        ``result -> None``; runs on the GUI thread, only for the newest request.
    delay_ms : int
        Debounce: wait this long after a request for more before starting. With 0 an
        idle runner starts at once, and requests arriving while it runs are coalesced
        into one (only the newest is started when the running one ends).
    """

    delivered = Signal(float)  # seconds from the request to the end of ``deliver``
    failed = Signal(object)

    def __init__(self, compute: Callable, deliver: Callable, *, delay_ms: int = 0, parent=None):
        super().__init__(parent)
        self._compute = compute
        self._deliver = deliver
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(int(delay_ms))
        self._timer.timeout.connect(self._launch)
        self._generation = 0
        self._pending = None
        self._running = None
        self.dropped = 0

    def request(self, payload) -> None:
        """Ask for a computation; replaces any request not yet started."""
        self._generation += 1
        self._pending = (self._generation, payload, time.perf_counter())
        if self._timer.interval() == 0 and self._running is None:
            self._launch()
        else:
            self._timer.start()

    @property
    def idle(self) -> bool:
        return self._running is None and self._pending is None and not self._timer.isActive()

    def _launch(self) -> None:
        if self._running is not None or self._pending is None:
            return
        generation, payload, asked = self._pending
        self._pending = None
        worker = create_worker(self._compute, payload, _start_thread=False)
        worker.returned.connect(lambda result: self._returned(generation, asked, result))
        worker.errored.connect(lambda exc: self._errored(generation, exc))
        worker.finished.connect(self._finished)
        self._running = worker
        worker.start()

    def _returned(self, generation: int, asked: float, result) -> None:
        if not is_alive(self):
            return  # the widget owning this runner is gone
        if generation != self._generation:
            self.dropped += 1  # a newer request exists: this result is stale
            return
        self._deliver(result)
        self.delivered.emit(time.perf_counter() - asked)

    def _errored(self, generation: int, exc) -> None:
        if is_alive(self) and generation == self._generation:
            self.failed.emit(exc)

    def _finished(self) -> None:
        self._running = None
        if self._pending is not None and is_alive(self):
            self._launch()

    def stop(self) -> None:
        """Forget waiting requests (a running computation ends on its own; its result is dropped)."""
        self._timer.stop()
        self._pending = None
        self._generation += 1
