"""Whole ROIs washed side by side in worker processes of this machine (the run's process pool).

A small ROI spends most of its time in Python (the GIL), so the chunk threads of one ROI
cannot keep two cores busy; a worker process per core, each washing one whole ROI at a
time, can. :func:`pool_size` decides whether a run uses the pool (and how many processes),
:func:`wash_in_processes` runs the jobs on it and yields their ledger records in the order
they finish. The ledger stays a single writer: the records come back to this process.

- The processes start from a fork server (Linux) that imported the engine once
  (:func:`multiprocessing.set_forkserver_preload`), so each starts without importing it
  again, with what a first ROI would import already imported (:mod:`.warm`: the reading
  and washing modules, the default recipe's speckle tables); the
  command line starts it before it imports the engine itself when the cohort looks bound
  for the pool (:func:`start_for_cohort`). Elsewhere (Windows, macOS) they are spawned.
  The fork server is started with one BLAS/OpenMP thread and its warm-up runs no kernel,
  so it runs no thread when it forks (a process is never forked while it runs threads).
- Each worker washes one ROI at a time with ``cores // processes`` threads (numba,
  OpenMP and BLAS set to match).
- A worker that dies (killed, out of memory) gives its ROI a ``failed`` record and is
  replaced; the other ROIs go on.
- Closing the pool (the end of the run, Ctrl-C, SIGTERM, an error) stops every worker:
  SIGTERM makes a worker drop its ROI's files (as an interrupt does in this process),
  a worker still alive after a few seconds is killed, and the caller sweeps what is left.
  A worker also holds the reading end of a pipe only this process writes to (its
  lifeline): when this process ends, even by ``kill -9``, the pipe closes and the
  worker stops the same way.
"""

from __future__ import annotations

import collections
import os
import signal
import sys
import types
from collections.abc import Iterable
from pathlib import Path

#: ROIs whose pixels (channels x height x width x bytes per value) exceed this are washed
#: in this process, one after the other, their chunks on all cores: such an ROI's chunk
#: threads keep the cores busy, and a process per core would hold one such ROI each.
POOL_ROI_BYTES = 64 * 2**20

#: Memory one worker is assumed to need: a fixed part (the engine's imports and working
#: buffers) and a multiple of its ROI's pixel bytes (raw, washed and the wash's and the
#: quality's working planes). The pool gets at most as many processes as fit in half the
#: memory available when the run starts.
WORKER_BASE_BYTES = 256 * 2**20
WORKER_BYTES_PER_PIXEL_BYTE = 8

#: Seconds a worker has to stop after SIGTERM before it is killed.
STOP_SECONDS = 10.0

#: What the fork server imports once, for every worker it forks; the last one
#: (:mod:`.warm`) imports what a worker's first ROI would and makes the default tables.
PRELOAD = ["plexwash.qc.run.pool", "plexwash.qc.run.execute", "plexwash.qc.wash",
           "plexwash.qc.quality", "plexwash.qc.audit", "plexwash.qc.io", "plexwash.qc.steps.registry",
           "plexwash.qc.spillover", "plexwash.qc.run.warm"]


class WorkerDied(RuntimeError):
    """The worker process washing an ROI ended without returning its record."""


def pool_size(jobs, cores: int) -> int:
    """Worker processes for a run's jobs on ``cores`` cores; 0 to wash in this process.

    The pool is used when there are at least two ROIs and two cores, the largest input's
    pixels are at most :data:`POOL_ROI_BYTES` and at least two workers fit in half the
    available memory (:data:`WORKER_BASE_BYTES` + :data:`WORKER_BYTES_PER_PIXEL_BYTE` x the
    pixel bytes each). The largest input is the largest file on disk; its header gives the
    pixel bytes.
    """
    processes = min(cores, len(jobs))
    if processes < 2:
        return 0
    largest = max(jobs, key=lambda job: _disk_bytes(job.input)).input
    pixels = _pixel_bytes(largest) or _disk_bytes(largest)
    if pixels > POOL_ROI_BYTES:
        return 0
    available = _available_memory()
    if available is not None:
        processes = min(processes, int(available // 2 // (WORKER_BASE_BYTES + WORKER_BYTES_PER_PIXEL_BYTE * pixels)))
    return processes if processes >= 2 else 0


def wash_in_processes(jobs, processes: int, cores: int, wash, failed) -> Iterable[dict]:
    """Wash the jobs on ``processes`` worker processes; yield each ROI's record as it finishes.

    ``wash(job) -> record`` runs in the workers (a module-level function, pickled by name);
    each job gets ``threads = max(1, cores // processes)``. A worker that dies yields
    ``failed(job, exc)`` (a ``failed`` record, made here) for its ROI and is replaced while
    jobs remain. Closing the generator (or an exception in it, e.g. Ctrl-C) stops every
    worker before it returns.
    """
    import dataclasses
    from multiprocessing.connection import wait

    threads = max(1, cores // processes)
    pending = collections.deque(dataclasses.replace(job, threads=threads) for job in jobs)
    context = _context()
    idle: list[_Worker] = []
    busy: dict[object, _Worker] = {}  # a busy worker's connection -> the worker
    try:
        while pending or busy:
            while pending and len(busy) < processes:
                worker = idle.pop() if idle else _Worker(context, threads, wash)
                if not worker.give(pending[0]):  # it ended while idle: a new one takes the job
                    code = worker.stop()
                    if worker.fresh:
                        yield failed(pending.popleft(), WorkerDied(
                            f"a new worker process ended (exit code {code}) before it could take it"))
                    continue
                pending.popleft()
                busy[worker.conn] = worker
            # a short timeout: an asynchronous KeyboardInterrupt (the studio's Cancel) is
            # delivered between waits
            ready = wait([*busy, *(w.process.sentinel for w in busy.values())], timeout=0.2)
            for worker in list(busy.values()):
                if worker.conn not in ready and worker.process.sentinel not in ready:
                    continue
                del busy[worker.conn]
                job = worker.job
                record = worker.take()
                if record is None:  # the process ended without its record
                    code = worker.stop()
                    record = failed(job, WorkerDied(
                        f"the worker process washing it ended (exit code {code}) without a result"))
                else:
                    worker.fresh = False
                    idle.append(worker)
                yield record
    finally:
        workers = [*idle, *busy.values()]
        for worker in workers:
            worker.finish()
        for worker in workers:
            worker.stop()


class _Worker:
    """One worker process and its end of the pipe; ``job`` is the ROI it washes, if any."""

    def __init__(self, context, threads: int, wash):
        here, there = context.Pipe()
        lifeline, self.lifeline = context.Pipe(duplex=False)  # never written: its end is the news
        self.process = context.Process(target=serve, args=(there, lifeline, threads, wash),
                                       name="plexwash-roi", daemon=True)
        main = sys.modules.get("__main__")
        # the worker needs nothing of the program running the run: with its main module
        # hidden while the worker starts, the worker does not import (and run) that
        # program's file again, so a script without `if __name__ == "__main__":` works
        sys.modules["__main__"] = types.ModuleType("__main__")
        try:
            self.process.start()
        finally:
            sys.modules["__main__"] = main
        there.close()
        lifeline.close()
        self.conn = here
        self.job = None
        self.fresh = True  # no job taken yet

    def give(self, job) -> bool:
        """Send the process a job; False when it has ended (nothing sent)."""
        try:
            self.conn.send(job)
        except (OSError, ValueError):
            return False
        self.job = job
        return True

    def take(self):
        """The record of the job, or None when the process ended without sending it."""
        try:
            if self.conn.poll():
                record = self.conn.recv()
                self.job = None
                return record
        except (EOFError, OSError):
            pass
        return None

    def finish(self) -> None:
        """Ask the process to end: SIGTERM while it washes, an empty job when idle."""
        if not self.process.is_alive():
            return
        if self.job is not None:
            self.process.terminate()
            return
        try:
            self.conn.send(None)
        except (OSError, ValueError):
            self.process.terminate()

    def stop(self) -> int | None:
        """Wait for the process to end (killed after :data:`STOP_SECONDS`); its exit code."""
        self.process.join(STOP_SECONDS)
        if self.process.is_alive():
            self.process.kill()
            self.process.join()
        self.conn.close()
        self.lifeline.close()
        return self.process.exitcode


def serve(conn, lifeline, threads: int, wash) -> None:
    """A worker's loop: receive a job, wash it, send its record, until told to end.

    SIGINT is left to the run's process (which stops the workers); SIGTERM raises
    KeyboardInterrupt, so the ROI in hand removes its files as an interrupted run does.
    The end of ``lifeline`` (the run's process has ended) sends this process SIGTERM.
    """
    import threading

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, _interrupt)
    threading.Thread(target=_watch, args=(lifeline,), name="plexwash-lifeline", daemon=True).start()
    _limit_threads(threads)
    try:
        while True:
            job = conn.recv()
            if job is None:
                return
            conn.send(wash(job))
    except (KeyboardInterrupt, EOFError, OSError):
        return


def _interrupt(signum, frame):
    raise KeyboardInterrupt(f"signal {signum}")


def _watch(lifeline) -> None:
    """Wait for the end of the lifeline (nothing is ever sent on it), then stop this worker."""
    try:
        lifeline.recv()
    except (EOFError, OSError):
        pass
    os.kill(os.getpid(), signal.SIGTERM)


def _limit_threads(threads: int) -> None:
    """numba, OpenMP and BLAS at ``threads`` in this worker; one malloc arena."""
    from .folder import bound_heap

    bound_heap()
    try:
        import numba

        numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
    except (ImportError, ValueError):
        pass
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(threads)
    except ImportError:
        pass


#: Thread settings of the fork server's environment: it imports numpy (and its BLAS)
#: with one thread, so it runs no thread when it forks a worker.
_ONE_THREAD = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
               "OMP_WAIT_POLICY": "PASSIVE"}


def start_server() -> None:
    """Start the workers' fork server now (Linux; elsewhere nothing to start).

    Starting it is quick: its preload (the engine's imports and default tables, about a
    second or two of one core) runs in the server's own process, so a run that starts it
    before planning its jobs has that done by the time it forks the first worker.
    """
    _context()


def start_for_cohort(cohort_dir, workers=None) -> bool:
    """Start the fork server (:func:`start_server`) at once when a run of ``cohort_dir`` looks
    bound for the pool; True when started.

    A guess made before anything heavy is imported, from the cohort's file names and sizes
    on disk only: ``workers`` given, or at least two ROIs, two cores and the largest ROI
    file at most :data:`POOL_ROI_BYTES` on disk. The run still decides exactly
    (:func:`pool_size`) once its inputs are checked; a wrong guess only starts the server
    early (an idle process) or leaves it to be started then.
    """
    from ..errors import InputError
    from ..io.cohort import list_cohort

    if not sys.platform.startswith("linux"):
        return False
    if workers is None:
        try:
            rois = list_cohort(cohort_dir)
        except (InputError, OSError):  # the run says what is wrong with the folder
            return False
        if len(rois) < 2 or len(os.sched_getaffinity(0)) < 2 or max(map(_disk_bytes, rois)) > POOL_ROI_BYTES:
            return False
    start_server()
    return True


def _context():
    """The multiprocessing context of the workers: a fork server on Linux, spawn elsewhere."""
    import multiprocessing

    if not sys.platform.startswith("linux"):
        return multiprocessing.get_context("spawn")
    context = multiprocessing.get_context("forkserver")
    from multiprocessing import forkserver

    server = getattr(forkserver, "_forkserver", None)  # the module's one fork server
    if server is not None and getattr(server, "_forkserver_pid", 0) is None:  # not started yet: start it now, with one thread
        context.set_forkserver_preload(PRELOAD)
        saved = {name: os.environ.get(name) for name in _ONE_THREAD}
        os.environ.update(_ONE_THREAD)
        try:
            server.ensure_running()
        finally:
            for name, value in saved.items():
                if value is None:
                    os.environ.pop(name, None)
                else:
                    os.environ[name] = value
    return context


def _disk_bytes(path: Path) -> int:
    try:
        return os.stat(path).st_size
    except OSError:
        return 0


def _pixel_bytes(path: Path) -> int | None:
    """Bytes of an ROI's pixels from its header (tifffile, or the OME-Zarr metadata; no pixel
    is read, dask is not loaded); None when unreadable."""
    try:
        if os.path.isdir(path):
            from ..io.zarr import open_zarr

            array = open_zarr(Path(path))[0]
            shape, dtype = array.shape, array.dtype
        else:
            import tifffile

            with tifffile.TiffFile(path) as tif:
                shape, dtype = tif.series[0].shape, tif.series[0].dtype
        count = 1
        for n in shape:
            count *= int(n)
        return count * dtype.itemsize
    except Exception:  # an unreadable ROI fails in its own task, with its own error
        return None


def _available_memory() -> int | None:
    """Memory available to new processes (Linux ``MemAvailable``), None where unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as file:
            for line in file:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None
