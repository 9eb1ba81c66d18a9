"""Executing a run's jobs: worker processes of this machine, this process, or dask.distributed.

The unit of work is one whole ROI (:func:`wash_one`): read, wash, write atomically, measure
quality on raw and washed, hash, and return the ROI's ledger record. By default small
ROIs are washed side by side on a pool of worker processes, one per core
(:mod:`.pool`, which also says when), and otherwise in this process one after the other,
each ROI's chunks on a thread pool of all cores; with ``workers=N`` on a pool of N worker
processes; with a scheduler address on a running cluster (``Client(address)``, reached
first by :func:`connect`).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
import socket
import threading
import time
import traceback
from collections.abc import Iterable
from pathlib import Path

from .._version import __version__
from ..errors import InputError, OutputError
from ..files import remove_path, temporary_path
from ..ledger import json_ready
from .folder import bound_heap, release_memory
from .plan import Job
from .pool import pool_size, start_server, wash_in_processes


def connect(scheduler: str, timeout: float):
    """A client of a running dask scheduler, or InputError when it cannot be reached in time."""
    try:
        from distributed import Client
    except ImportError:  # pragma: no cover - the cluster extra is not installed
        raise InputError("--scheduler", "needs dask.distributed (pip install 'plexwash[cluster]')") from None
    if not timeout > 0:
        raise InputError("--connect-timeout", f"must be a positive number of seconds, got {timeout!r}")
    try:
        return Client(scheduler, timeout=timeout)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise InputError(scheduler, f"cannot reach the dask scheduler in {timeout:g} s "
                         f"({' '.join(str(exc).split()) or exc.__class__.__name__})") from None


def execute(jobs: list[Job], *, workers, client, log) -> Iterable[dict]:
    """Run the jobs and yield their ledger records as they finish."""
    if not jobs:
        return
    if client is not None:
        yield from _execute_on_cluster(jobs, client=client, log=log)
        return
    cores = _cpu_count()
    processes = int(workers) if workers is not None else pool_size(jobs, cores)
    if not processes:
        yield from _execute_here(jobs)
        return
    processes = min(processes, len(jobs))
    log.line(f"washing on {processes} worker process(es), {max(1, cores // processes)} thread(s) each")
    yield from wash_in_processes(jobs, processes, cores, wash_one, _died)


def start_early(inputs: list[Path], *, workers, client) -> bool:
    """Start the worker processes' fork server now when :func:`execute` will wash these
    inputs on the pool (the same choice, from the inputs alone), so that its preload runs
    while the run is planned; True when started."""
    if client is not None or not inputs:
        return False
    processes = int(workers) if workers is not None else pool_size(
        [_Input(Path(path)) for path in inputs], _cpu_count())
    if processes:
        start_server()
    return bool(processes)


@dataclasses.dataclass(frozen=True)
class _Input:
    """What :func:`pool_size` reads of a job: its input path."""

    input: Path


def _died(job: Job, exc: BaseException) -> dict:
    """The record of an ROI whose worker process ended without returning one."""
    return _failed_record(job, exc, seconds=0.0, started=_now())


def _execute_here(jobs: list[Job]) -> Iterable[dict]:
    """One ROI after the other in this process; each ROI's chunks on a pool we own.

    Owning the pool lets an interrupt wait for the chunk tasks already running to end
    before the temporary files are swept (so none is recreated afterwards).
    """
    from concurrent.futures import ThreadPoolExecutor

    import dask

    threads = _cpu_count()
    bound_heap()  # before the pool's threads exist
    pool = ThreadPoolExecutor(threads, thread_name_prefix="plexwash-chunk")
    try:
        with dask.config.set(scheduler="threads", pool=pool):
            for job in jobs:
                yield wash_one(dataclasses.replace(job, threads=threads))
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _execute_on_cluster(jobs: list[Job], *, client, log) -> Iterable[dict]:
    """Whole ROIs as tasks on a running dask.distributed cluster (joined by :func:`connect`)."""
    from distributed import as_completed

    # joined before the run folder was touched (run_cohort)
    log.line(f"joined the dask cluster at {client.scheduler.address} "
             f"({len(client.scheduler_info().get('workers', {}))} worker(s))")
    futures = {}
    try:
        for job in jobs:
            key = f"plexwash-wash-{job.roi}-{os.urandom(4).hex()}"
            futures[client.submit(wash_one, job, key=key, pure=False, retries=0)] = job
        for future in as_completed(futures):
            job = futures.pop(future)
            try:
                yield future.result()
            except Exception as exc:  # the worker died (KilledWorker) or the task could not run
                yield _failed_record(job, exc, seconds=0.0, started=_now())
    finally:
        if futures:
            client.cancel(list(futures))
        client.close()


def wash_one(job: Job) -> dict:
    """Wash one ROI of a run and return its ledger record (never raises for a bad ROI).

    Reads the input, washes it with the run's recipe, writes the washed stack atomically,
    measures quality on raw and washed (the washed pixels still at hand), records the
    input's and output's size and modification time and hashes them. Runs in this process or on a dask
    worker (the job holds only paths and hashes, so it pickles small).

    Parameters
    ----------
    job : Job
        One ROI as planned by :func:`plexwash.qc.run.plan.plan_jobs`.

    Returns
    -------
    dict
        The ledger record: ``status`` ``done`` with hashes, timings, removed fractions and
        quality rows, or ``failed`` with ``error``.
    """
    import dask

    bound_heap()
    started = _now()
    t0 = time.perf_counter()
    out_dir = job.out_dir
    written: list[Path] = []
    try:
        threads = job.threads or _worker_threads()
        config = {"scheduler": "threads"}
        if dask.config.get("pool", None) is None:  # a worker process: its share of the cores
            config = {"scheduler": "sync" if threads == 1 else "threads", "num_workers": threads}
        with dask.config.set(config):
            record = _wash_and_measure(job, out_dir, written)
    except BaseException as exc:
        for path in written:  # a result that is not recorded done is not left under its name
            remove_path(path)
        if not isinstance(exc, Exception):  # KeyboardInterrupt, SystemExit: stop the run
            raise
        return _failed_record(job, exc, seconds=time.perf_counter() - t0, started=started)
    record.update(seconds=round(time.perf_counter() - t0, 3), started=started, finished=_now())
    return record


def _wash_and_measure(job: Job, out_dir: Path, written: list) -> dict:
    from ..audit import audit_washed
    from ..io import file_stamp, read_roi, read_stains, sha256_path
    from ..wash import wash_to_file

    timings = {}
    clock = time.perf_counter()

    def lap(name):
        nonlocal clock
        now = time.perf_counter()
        timings[name] = round(now - clock, 3)
        clock = now

    input_stamp = file_stamp(job.input)  # before the hash: a later change shows on resume
    input_sha256 = job.input_sha256 or sha256_path(job.input)
    lap("hash_input")
    recipe, recipe_sha256 = _once(job.recipe, _recipe_and_hash)
    if recipe_sha256 != job.recipe_sha256:
        raise InputError(job.recipe, "recipe changed while the run was going")
    roi = read_roi(job.input, stains=_once(job.stains, read_stains) if job.stains else None)
    recipe.check_size(roi)
    matrix = None
    if job.spillover:
        from ..spillover import read_spillover

        matrix = _once(job.spillover, read_spillover)
    lap("read")
    if job.output is not None:
        target = out_dir / job.output
    else:  # quality only: the washed stack lives under a temporary name until measured
        from ..io import output_name

        target = temporary_path(out_dir / output_name(job.roi), "measure")
    provenance = {"input_sha256": input_sha256, "recipe_sha256": job.recipe_sha256,
                  "spillover_sha256": job.spillover_sha256, "stains_sha256": job.stains_sha256}
    quality_seconds, audit = [], []

    def measure(washed):  # the washed pixels as written, before the staging goes
        start = time.perf_counter()
        measured = measure_quality(roi, washed, recipe, matrix, threads=job.threads or _worker_threads())
        audit.extend(audit_washed(roi, washed, recipe))
        quality_seconds.append(time.perf_counter() - start)
        return measured

    written.append(target)  # removed if anything fails from here on, the quality included
    result = wash_to_file(roi, target, recipe, spillover=matrix, staging_dir=job.staging_dir,
                          provenance=provenance, measure=measure)
    if job.output is not None and recipe.output.tissue_mask:
        from ..mask_file import mask_path, write_tissue_mask

        written.append(write_tissue_mask(roi, mask_path(target), recipe, provenance=provenance))
    release_memory()
    lap("wash_write")
    timings["quality"] = round(quality_seconds[0], 3)
    timings["wash_write"] = round(timings["wash_write"] - quality_seconds[0], 3)
    output_sha256 = output_stamp = None
    if job.output is not None:
        output_stamp = file_stamp(target)
        output_sha256 = sha256_path(target)
    lap("hash_output")
    raw_rows, washed_rows, roi_flags = result.measured
    for row in raw_rows + washed_rows:  # the ROI's id (its path in the cohort), not its file stem
        row["roi"] = job.roi
    if job.output is None:
        remove_path(target)
    stats = json_ready(result.stats)
    removed = {step: {row["channel"]: row.get("removed_fraction") for row in rows}
               for step, rows in stats.items()}
    shape = [int(n) for n in roi.shape]
    record = _base_record(job)
    record.update(
        status="done", input_sha256=input_sha256, output=job.output,
        output_sha256=output_sha256, input_stamp=input_stamp, output_stamp=output_stamp, shape=shape, dtype=str(roi.data.dtype),
        channels=list(roi.channels), labels=list(roi.labels), used=[bool(u) for u in roi.use],
        removed_fraction=removed, steps=stats, notes=list(result.notes),
        roi_flags=roi_flags, median_sbr=_median_sbr(raw_rows, washed_rows),
        timings=timings, quality=json_ready(raw_rows + washed_rows))
    if audit:
        record["audit"] = json_ready(audit)
    return record


def _once(path, load):
    """``load(path)``, kept for the next ROIs of the run while the file keeps its size,
    modification time and inode (the recipe, stain sheet and matrix are the same for every
    ROI: parsed and hashed once per process instead of once per ROI). What is kept is
    immutable (frozen settings, a spillover matrix whose values are copied when aligned)."""
    try:
        st = os.stat(path)
    except OSError:  # the loader says what is wrong, as without the cache
        return load(path)
    key = (str(path), load, st.st_size, st.st_mtime_ns, st.st_ino)
    with _kept_lock:
        if key in _kept:
            return _kept[key]
    value = load(path)
    with _kept_lock:
        if len(_kept) >= 16:
            _kept.clear()
        _kept[key] = value
    return value


def _recipe_and_hash(path):
    from ..recipe import load_recipe

    recipe = load_recipe(path)
    return recipe, recipe.sha256()


_kept: dict = {}
_kept_lock = threading.Lock()


def measure_quality(roi, washed, recipe, matrix, *, threads: int = 1):
    """Quality rows of the raw ROI and of the washed stack (quality.measure_roi).

    ``washed`` is the stack as written: an array or array store, or the written file's path.
    """
    from ..quality import measure_roi

    if isinstance(washed, (str, Path)):
        from ..io import read_roi

        washed = read_roi(washed).data
    measured = measure_roi(roi, recipe, spillover=matrix, washed=washed, threads=threads)
    return measured.raw_rows, measured.washed_rows, measured.flags


def _median_sbr(raw_rows, washed_rows) -> dict:
    import numpy as np

    out = {}
    for stage, rows in (("raw", raw_rows), ("washed", washed_rows)):
        values = [r["sbr"] for r in rows if r.get("sbr") is not None and math.isfinite(r["sbr"])]
        out[stage] = float(np.median(values)) if values else None
    return out


def _cpu_count() -> int:
    """Cores this process may use (the batch system's allocation, not the whole node)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def _worker_threads() -> int:
    """Threads for one ROI's chunks on a dask worker: its cores shared by its task slots."""
    try:
        from distributed import get_worker

        slots = get_worker().state.nthreads
    except (ImportError, ValueError, AttributeError):
        slots = 1
    return max(1, _cpu_count() // max(1, slots))


def _base_record(job: Job) -> dict:
    return {
        "roi": job.roi, "status": None, "input": str(job.input),
        "input_sha256": job.input_sha256, "output": None, "output_sha256": None,
        "recipe_sha256": job.recipe_sha256, "spillover_sha256": job.spillover_sha256,
        "stains_sha256": job.stains_sha256, "version": __version__,
        "host": socket.gethostname(), "pid": os.getpid(),
        **({"sample": dict(job.sample)} if job.sample else {}),
    }


def _failed_record(job: Job, exc: BaseException, *, seconds: float, started: str) -> dict:
    record = _base_record(job)
    if isinstance(exc, (InputError, OutputError)):
        error = str(exc)
    else:
        error = f"{exc.__class__.__name__}: {exc}"
        record["traceback"] = "".join(traceback.format_exception(exc))[-4000:]
    record.update(status="failed", error=" ".join(error.split()), seconds=round(seconds, 3),
                  started=started, finished=_now())
    return record


def _now() -> str:
    """The time now, UTC, ISO 8601 with milliseconds (``2026-01-02T03:04:05.678Z``)."""
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
