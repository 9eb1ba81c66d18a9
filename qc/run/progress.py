"""Progress of a run: ``run.log`` always; on stderr a bar (terminal) or timestamped lines."""

from __future__ import annotations

import datetime as _dt
import os
import sys
import time
from collections.abc import Mapping
from pathlib import Path

from ..errors import OutputError
from ..files import mark_written, output_error


class RunLog:
    """Progress of a run: ``run.log`` always; on stderr a bar (terminal) or timestamped lines."""

    def __init__(self, path: Path, *, progress: bool):
        self.path = path
        self.progress = progress
        self.fancy = progress and sys.stderr.isatty()
        self._fd = None
        self.error: str | None = None  # set when run.log could not be written (a full disk)
        self._bar = None
        self._task = None
        self._total = 0
        self._finished = 0
        self._t0 = time.perf_counter()

    def __enter__(self):
        self._fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o666)
        mark_written(self.path)
        return self

    def __exit__(self, *exc):
        self.stop()
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        return False

    def line(self, text: str) -> None:
        stamped = f"{_dt.datetime.now().astimezone().isoformat(timespec='seconds')} {text}"
        self._append(stamped + "\n")
        if not self.progress:
            return
        if self._bar is not None:
            self._bar.console.print(text, highlight=False, markup=False)
        else:
            print(stamped, file=sys.stderr, flush=True)

    def _append(self, text: str) -> None:
        """One whole line onto run.log; on a full disk the log stops (the run goes on)."""
        if self._fd is None:
            return
        size = os.fstat(self._fd).st_size
        data = text.encode("utf-8")
        try:
            while data:
                data = data[os.write(self._fd, data):]
        except OSError as exc:
            error = output_error(exc, self.path)
            if not isinstance(error, OutputError):
                raise
            os.ftruncate(self._fd, size)
            os.close(self._fd)
            self._fd = None
            self.error = str(error)

    def start(self, total: int) -> None:
        self._total = total
        self._finished = 0
        self._t0 = time.perf_counter()
        if not (self.fancy and total):
            return
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._bar = Progress(TextColumn("washing"), BarColumn(), MofNCompleteColumn(),
                             TextColumn("elapsed"), TimeElapsedColumn(), TextColumn("left"),
                             TimeRemainingColumn(), TextColumn("{task.fields[last]}"),
                             console=Console(file=sys.stderr), transient=False)
        self._bar.start()
        self._task = self._bar.add_task("wash", total=total, last="")

    def finished(self, record: Mapping) -> None:
        self._finished += 1
        elapsed = time.perf_counter() - self._t0
        left = self._total - self._finished
        eta = elapsed / self._finished * left
        if record["status"] == "done":
            what = f"{record['roi']}: done in {record.get('seconds', 0):.1f} s"
        else:
            what = f"{record['roi']}: FAILED: {record.get('error')}"
        self.line(f"{what} [{self._finished}/{self._total}, about {duration(eta)} left]")
        if self._bar is not None:
            self._bar.update(self._task, advance=1, last=record["roi"])

    def stop(self) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None


def duration(seconds: float) -> str:
    """A duration for people: ``42 s``, ``3 min 07 s``, ``2 h 05 min``."""
    seconds = int(round(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, seconds = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"
