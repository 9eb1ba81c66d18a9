"""The run folder while a run writes into it: the output guard, the lock, interrupts, the heap.

A run refuses a folder that would overwrite an input or a file plexwash did not write
(:func:`check_run_folder`), holds a lock on it so that a second run into the same folder
is refused (:func:`run_lock`), turns Ctrl-C and SIGTERM into a clean stop
(:func:`interrupts`) and keeps its memory from growing with the number of threads
(:func:`bound_heap`, :func:`release_memory`).
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from pathlib import Path

from filelock import FileLock, Timeout

from ..errors import InputError
from ..files import check_output_folder, interval_paths
from ..ledger import (
    LEDGER,
    QUALITY,
    RECIPE,
    REPORT,
    RUN_LOCK,
    RUN_LOG,
    SPILLOVER_COPY,
    STAINS_COPY,
    read_ledger,
)


def check_run_folder(out: Path, inputs, roi_outputs) -> None:
    """Refuse a run folder that would overwrite an input or a file plexwash did not write.

    A folder an earlier run wrote (it holds the run lock) vouches for its log, ledger and
    the outputs its ledger records.
    """
    names = [LEDGER, RUN_LOG, QUALITY, REPORT, RECIPE, SPILLOVER_COPY, STAINS_COPY,
             *(p.name for p in interval_paths(SPILLOVER_COPY)), *roi_outputs]
    ours: list[str] = []
    if (out / RUN_LOCK).is_file():
        ours = [LEDGER, RUN_LOG, *(r["output"] for r in read_ledger(out) if r.get("output"))]
        # the run's own hand-off copies may be given back to it (a rerun with its recipe):
        # they are read in full before the run rewrites them from what was read
        own = {os.path.realpath(out / n) for n in (RECIPE, SPILLOVER_COPY, STAINS_COPY)}
        own.update(os.path.realpath(p) for p in interval_paths(out / SPILLOVER_COPY))
        inputs = [p for p in inputs if os.path.realpath(p) not in own]
    check_output_folder(out, inputs, names, ours=ours)


@contextlib.contextmanager
def run_lock(out_dir: Path):
    """An exclusive lock on the run folder; the operating system drops it if the process dies.

    Raises
    ------
    InputError
        When another run (in this or another process) holds the lock.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / RUN_LOCK
    lock = FileLock(path, timeout=0)
    try:
        lock.acquire()
    except Timeout:
        raise InputError(out_dir, "another plexwash run is writing into this folder") from None
    try:
        yield
    finally:
        lock.release()
        # the lock file also marks a folder a run wrote (check_run_folder); where the
        # platform's lock removes it on release (Windows), it is put back
        path.touch(exist_ok=True)


@contextlib.contextmanager
def interrupts():
    """Ctrl-C and SIGTERM (a batch system's time limit) stop the run, reliably.

    Both raise ``KeyboardInterrupt`` and also set the returned event, which the run checks
    after every ROI: an interrupt that CPython swallows (one arriving while the garbage
    collector runs a finaliser is reported as "ignored") still stops the run at the next
    ROI. A signal that was ignored before the run (``nohup``) stays ignored.
    """
    event = threading.Event()
    if threading.current_thread() is not threading.main_thread():
        yield event
        return

    def _raise(signum, frame):
        event.set()
        raise KeyboardInterrupt(f"signal {signum}")

    previous = {}
    for number in (signal.SIGINT, signal.SIGTERM):
        if signal.getsignal(number) is not signal.SIG_IGN:
            previous[number] = signal.signal(number, _raise)
    try:
        yield event
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)


def release_memory() -> None:
    """Hand freed heap memory back to the operating system (glibc ``malloc_trim``).

    Between the parts of an ROI (wash, quality) most of what was allocated is free again,
    but glibc keeps freed blocks of up to 32 MiB in its per-thread arenas, so the process
    would carry the wash's high-water mark into the quality measurements and the next
    ROI. Trimming makes the peaks of the parts not add up. A no-op where glibc is absent.
    (No ``gc.collect()`` here: a Ctrl-C arriving during a collection would be swallowed.)
    """
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


def bound_heap() -> None:
    """Let all threads allocate from one glibc malloc arena (``mallopt(M_ARENA_MAX, 1)``).

    By default glibc gives threads their own arenas (up to 8 per core); each keeps the
    freed planes of the channels its thread worked on, so a run's memory grows with the
    number of threads rather than with what they hold. The wash and the quality
    measurements allocate few, large arrays, so sharing one arena costs no measurable
    time (``benchmarks/memory.py``). Set once per process, before the chunk threads
    start; a no-op where glibc is absent.
    """
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").mallopt(_M_ARENA_MAX, 1)
    except (OSError, AttributeError):
        pass


_M_ARENA_MAX = -8  # from glibc's malloc.h
