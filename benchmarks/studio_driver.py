"""Driving the whole studio as a user would, for the freeze benchmark and the soak test.

:class:`Studio` opens the five docked widgets on a cohort (``launch_studio``) and offers
each user action as a method that starts it the way a click would and returns once its
result is on the canvas. :class:`StallMeter` measures how long the GUI thread stops
answering: a timer ticks every 10 ms and the longest gap between two ticks, less the
10 ms, is the stall. :func:`make_cohort` writes a cohort of dense synthetic ROIs of any
size (round cells over a sparse background, a stain sheet and a spillover matrix).

Needs a display (Xvfb). Imported by ``benchmarks/studio_freezes.py`` and by
``tests/test_plugin_soak.py`` (through its file path: benchmarks/ is not a package).
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

TICK_MS = 10


def make_cohort(out, *, n_rois: int = 3, n_channels: int = 36, size: int = 1000, seed: int = 36) -> Path:
    """Write ``out/cohort/roi_NN.ome.tiff`` (uint16 counts), ``out/stains.csv``, ``out/spillover.csv``.

    Each channel shows its own subset of round cells over Poisson background, a few hot
    pixels, and neighbouring channels spill 1-3 % into each other. Returns the cohort folder.
    """
    from plexwash.qc.io import write_ome_tiff
    from plexwash.qc.spillover import SpilloverMatrix, write_spillover

    out = Path(out)
    cohort = out / "cohort"
    cohort.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    channels = [f"Ch{100 + k}" for k in range(n_channels)]
    labels = [f"marker-{k + 1:02d}" for k in range(n_channels)]
    spill = np.eye(n_channels)
    for k in range(n_channels - 1):
        spill[k, k + 1] = rng.uniform(0.01, 0.03)
        spill[k + 1, k] = rng.uniform(0.005, 0.015)
    (out / "stains.csv").write_text("tag,marker,wash\n" + "".join(
        f"{c},{lab},yes\n" for c, lab in zip(channels, labels, strict=True)))
    write_spillover(out / "spillover.csv", SpilloverMatrix(tuple(channels), spill))
    yy, xx = np.mgrid[-6:7, -6:7]
    disc = (yy ** 2 + xx ** 2) <= 36
    for r in range(n_rois):
        true = np.zeros((n_channels, size, size), np.float32)
        centres = rng.integers(8, size - 8, size=(max(50, size * size // 1500), 2))
        owner = rng.integers(0, n_channels, size=len(centres))
        for (cy, cx), k in zip(centres, owner, strict=True):
            true[k, cy - 6:cy + 7, cx - 6:cx + 7][disc] += rng.uniform(5, 30)
        mixed = np.tensordot(spill.T.astype(np.float32), true, axes=1) + 0.2
        counts = rng.poisson(mixed).astype(np.uint16)
        hot = rng.integers(0, size, size=(n_channels, 20, 2))
        for k in range(n_channels):
            counts[k, hot[k, :, 0], hot[k, :, 1]] = 800
        write_ome_tiff(cohort / f"roi_{r + 1:02d}.ome.tiff", counts, channels, pixel_size=(1.0, 1.0))
    return cohort


class StallMeter:
    """The longest stall of the GUI thread while it is armed: a 10 ms timer's largest gap."""

    def __init__(self):
        from qtpy.QtCore import QTimer

        self.timer = QTimer()
        self.timer.setInterval(TICK_MS)
        self.timer.timeout.connect(self._tick)
        self._last = None
        self.worst = 0.0

    def _tick(self):
        now = time.perf_counter()
        if self._last is not None:
            self.worst = max(self.worst, now - self._last - TICK_MS / 1000)
        self._last = now

    def arm(self):
        self.worst = 0.0
        self._last = time.perf_counter()
        self.timer.start()

    def disarm(self) -> float:
        self._tick()
        self.timer.stop()
        self._last = None
        return max(0.0, self.worst)


class Studio:
    """The five widgets on a cohort, with one method per user action (each waits for its result)."""

    def __init__(self, cohort_dir, *, matrix=None, timeout: float = 180.0):
        from plexwash.plugin import launch_studio
        from qtpy.QtCore import QEventLoop, QTimer

        self.timeout = timeout
        self.viewer = launch_studio(cohort_dir, show=True, run=False)  # as ``plexwash studio`` does
        self.w = {name.split(" (")[0]: w for name, w in self.viewer.window.dock_widgets.items()}
        self.cohort, self.speckle = self.w["Cohort"], self.w["Speckle"]
        self.quality, self.spillover = self.w["Quality"], self.w["Spillover"]
        self.meter = StallMeter()
        self._loop = QEventLoop()
        self._poll = QTimer()
        self._poll.setInterval(5)
        self._poll.timeout.connect(self._loop.quit)
        self._poll.start()
        self.until(lambda: self.cohort.state.roi is not None and not self.cohort.busy())
        self.settle()
        if matrix is not None:
            self.spillover.load(matrix)
            self.settle()

    # ------------------------------------------------------------------ waiting

    def until(self, done, timeout: float | None = None) -> None:
        """Run the Qt event loop (idle in C, as in real use) until ``done()``."""
        end = time.perf_counter() + (timeout or self.timeout)
        while not done():
            self._loop.exec()
            if time.perf_counter() > end:
                raise TimeoutError("the studio did not finish the action in time")

    def pump(self, seconds: float) -> None:
        end = time.perf_counter() + seconds
        self.until(lambda: time.perf_counter() >= end)

    def quiet(self) -> bool:
        """No background work left in any widget, no preview pending."""
        return (not any(w.busy() for w in self.w.values())) and self.speckle.runner.idle

    def settle(self, draw_s: float = 0.15) -> None:
        """Wait for every worker and preview, then let the canvas draw."""
        self.until(self.quiet)
        self.pump(draw_s)

    def timed(self, action, *args) -> float:
        """Seconds of the longest GUI-thread stall from the start of ``action`` to its result drawn."""
        from qtpy.QtCore import QTimer

        self.meter.arm()
        QTimer.singleShot(0, lambda: action(*args))  # started from the event loop, as a click
        self.pump(0.02)
        self.settle()
        return self.meter.disarm()

    # ------------------------------------------------------------------ actions

    def roi(self, row: int) -> None:
        self.cohort.load(row)

    def channel(self, row: int) -> None:
        self.cohort.channels.setCurrentRow(row)

    def view(self, view: str) -> None:
        self.cohort.set_view(view)

    def setting(self, value: int) -> None:
        self.speckle.forms["speckle"].editors["radius"].setValue(value)

    def live(self, on: bool) -> None:
        self.speckle.live.setChecked(on)

    def compensate(self) -> None:
        self.spillover.preview()

    def measure(self, stage: int = 0) -> None:
        self.quality.stage.setCurrentIndex(stage)
        self.quality.measure()

    def close(self) -> None:
        self._poll.stop()
        self.viewer.close()
