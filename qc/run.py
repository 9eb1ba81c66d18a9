"""The run: wash a whole cohort with one recipe, with a ledger, resume and a scheduler of choice.

What a run writes into its output folder
----------------------------------------
- one washed stack per ROI, same stem as the input (``<roi>.ome.tiff``, or ``.ome.zarr``
  when the recipe's ``[output] format = "ome-zarr"``);
- ``ledger.jsonl``: one JSON object per line and ROI attempt (status, hashes, timings,
  removed fractions, quality rows); the single source of truth of the run;
- ``quality.csv``: one row per ROI x channel x stage (``raw`` / ``washed``), rebuilt from
  the ledger at the end of every run, with cohort outliers flagged (modified z-score);
- ``report.html``: the cohort's QC report (:func:`plexwash.qc.report.write_report`);
- ``recipe.toml`` (+ ``spillover.csv`` and ``panel.csv`` when used): the recipe exactly as
  applied, self-contained (its ``[compensation] spillover`` names the copy beside it);
- ``run.log``: timestamped progress lines of every run into this folder.

Scheduling
----------
The unit of work is one whole ROI: a task reads the ROI, washes it, writes the washed
stack atomically, hashes it and measures quality on raw and washed. Whole ROIs keep every
write local to the process that computed it (no pixels travel between processes), make a
task's result all-or-nothing, and let the ledger stay a single writer (this process).
Inside a task the ROI's chunks run on dask's threaded scheduler.

- default: in this process, one ROI after the other, each ROI's chunks on all cores;
- ``workers=N``: a ``dask.distributed.LocalCluster`` of N worker processes, one ROI per
  worker at a time, each with ``cores // N`` threads for its chunks;
- ``scheduler="tcp://host:port"``: join a running cluster (``Client(address)``); its
  workers must see the same paths (a shared file system).

The pixels do not depend on the scheduler or the number of workers: every ROI is washed
by the same code with the same chunking, whichever process runs it.

Resume and safety
-----------------
A rerun skips an ROI whose latest ledger record is ``done`` when its output still exists
and hashes to the recorded ``output_sha256``, and the input, recipe, spillover matrix,
panel and plexwash version are unchanged; everything else is (re)done. Outputs are written
under a temporary name and renamed, ledger lines are appended one at a time and fsynced,
so ``kill -9`` loses only the ROIs in flight; leftover temporary files are removed when
the next run starts. Ctrl-C (or SIGTERM) stops the run: nothing is recorded for the ROIs
in flight, their temporary files and any output they finished without being recorded are
removed, and ``KeyboardInterrupt`` propagates (with a remote scheduler, a task already
running on a worker may still finish writing; the next run redoes it). One
unreadable ROI is recorded ``failed`` with its error; the others go on; the exit code is
then 3. Inputs are only ever opened for reading. A lock file keeps two runs from writing
into the same folder at once.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import fcntl
import math
import os
import signal
import socket
import sys
import threading
import time
import traceback
from collections.abc import Iterable, Mapping
from pathlib import Path

from ._version import __version__
from .errors import InputError, OutputError
from .files import (
    check_output_folder,
    interval_paths,
    mark_written,
    output_error,
    reached_inputs,
    remove_path,
    sweep_leftovers,
    temporary_path,
    write_atomic,
)
from .ledger import LEDGER, Ledger, json_ready, latest_records, read_ledger, repair_ledger

QUALITY = "quality.csv"
REPORT = "report.html"
RECIPE = "recipe.toml"
SPILLOVER_COPY = "spillover.csv"
PANEL_COPY = "panel.csv"
RUN_LOG = "run.log"
_LOCK = ".plexwash-run.lock"

EXIT_OK, EXIT_ERROR, EXIT_SOME_FAILED = 0, 1, 3
#: Quality-table columns written first, in this order; the others follow as measured.
QUALITY_FIRST_COLUMNS = ("roi", "channel", "label", "stage", "sbr", "snr", "flags", "sbr_modified_z")
#: Cohort outliers: modified z-score of log(SBR) per channel and stage, |M| > 3.5
#: (Iglewicz & Hoaglin 1993; NIST/SEMATECH e-Handbook 1.3.5.17).
OUTLIER_METRIC, OUTLIER_CUTOFF = "sbr", 3.5
#: Fewer ROIs than this are too few to call any one an outlier (with 3 values the MAD is
#: set by a single deviation); the scores are still written (common practice).
OUTLIER_MIN_ROIS = 5


@dataclasses.dataclass(frozen=True)
class RunSummary:
    """What a cohort run did.

    Attributes
    ----------
    out_dir : Path
        The run's output folder.
    done, skipped, failed : int
        ROIs washed in this run, skipped because a valid earlier result exists, and failed.
    failed_rois : tuple of str
        Names of the ROIs that failed (the ledger holds their errors).
    seconds : float
        Wall time of the run.
    report : Path or None
        The report written at the end.
    """

    out_dir: Path
    done: int
    skipped: int
    failed: int
    failed_rois: tuple[str, ...] = ()
    seconds: float = 0.0
    report: Path | None = None
    error: str | None = None

    @property
    def total(self) -> int:
        return self.done + self.skipped + self.failed

    @property
    def exit_code(self) -> int:
        """0 when every ROI is done, 3 when some failed, 1 when only the closing files failed."""
        if self.failed:
            return EXIT_SOME_FAILED
        return EXIT_ERROR if self.error else EXIT_OK


# --------------------------------------------------------------------------- the run


def run_cohort(cohort_dir, out_dir, *, recipe=None, spillover=None, panel=None, workers=None,
               scheduler=None, connect_timeout=5.0, progress=True, cancel=None) -> RunSummary:
    """Wash every ROI of a cohort folder into a run folder, resuming an earlier run.

    Parameters
    ----------
    cohort_dir : str or Path
        Folder of ROIs (``.ome.tiff``, ``.tiff`` with a panel, ``.ome.zarr``).
    out_dir : str or Path
        The run folder (created when missing). Rerunning into the same folder resumes.
    recipe : Recipe, str or Path, optional
        The recipe (or its TOML file); defaults apply when omitted.
    spillover : str, Path or SpilloverMatrix, optional
        Spillover matrix CSV; overrides the recipe's ``[compensation] spillover``.
    panel : str, Path or Panel, optional
        ``panel.csv``; by default ``panel.csv`` inside the cohort folder when present.
    workers : int, optional
        Start a local cluster of this many worker processes.
    scheduler : str, optional
        Address of a running dask scheduler to use (``tcp://host:port``). It is reached
        before anything is written: an unreachable one leaves nothing behind.
    connect_timeout : float
        Seconds to try reaching ``scheduler`` before giving up.
    progress : bool
        Show progress on stderr (a bar on a terminal, timestamped lines otherwise).
        ``run.log`` is always written.
    cancel : threading.Event, optional
        When set (e.g. by a GUI's Cancel button), the run stops after the ROI in flight,
        exactly as on Ctrl-C (``KeyboardInterrupt``; finished ROIs stay recorded).

    Returns
    -------
    RunSummary
        ``exit_code`` is 0 when every ROI is done and 3 when some failed.

    Raises
    ------
    InputError
        Missing or empty cohort, output folder that is the cohort or not writable, bad
        recipe, spillover or panel, both ``workers`` and ``scheduler`` given, unreachable
        scheduler, another run writing into the same folder.
    KeyboardInterrupt
        On Ctrl-C or SIGTERM, after cleaning up (nothing false is recorded).

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from plexwash.qc.io import write_ome_tiff
    >>> tmp = pathlib.Path(tempfile.mkdtemp())
    >>> (tmp / "cohort").mkdir()
    >>> _ = write_ome_tiff(tmp / "cohort" / "a.ome.tiff", np.ones((2, 32, 32), np.float32), ["X1", "X2"])
    >>> summary = run_cohort(tmp / "cohort", tmp / "run", progress=False)
    >>> summary.done, summary.exit_code, (tmp / "run" / "a.ome.tiff").exists()
    (1, 0, True)
    """
    started = time.perf_counter()
    if workers is not None and scheduler is not None:
        raise InputError("--workers", "give either --workers or --scheduler, not both")
    if workers is not None and (isinstance(workers, bool) or int(workers) < 1):
        raise InputError("--workers", f"must be a whole number >= 1, got {workers!r}")
    inputs = _check_inputs(cohort_dir, out_dir, recipe=recipe, spillover=spillover, panel=panel)
    out = inputs["out_dir"]
    client = _connect(scheduler, connect_timeout) if scheduler is not None else None
    with contextlib.ExitStack() as stack:
        if client is not None:
            stack.callback(client.close)
        stack.enter_context(_run_lock(out))
        return _run_locked(inputs, out, started=started, workers=workers, client=client,
                           progress=progress, cancel=cancel)


def _run_locked(inputs, out: Path, *, started, workers, client, progress, cancel) -> RunSummary:
    """The run, once its folder is locked (see :func:`run_cohort`)."""
    with _RunLog(out / RUN_LOG, progress=progress) as log, _interrupts() as stop:
        removed = sweep_leftovers(out)
        if removed:
            log.line(f"removed {len(removed)} leftover temporary file(s) of an interrupted run")
        if repair_ledger(out / LEDGER):
            log.line(f"removed the torn last line of {LEDGER} (a run was killed while writing it)")
        plan = _write_run_files(inputs)
        jobs, skipped = _plan_jobs(plan, log)
        log.line(f"plexwash {__version__} run of {plan.cohort_dir} into {out}: {len(plan.rois)} ROI(s), "
                 f"{len(skipped)} already done, {len(jobs)} to wash"
                 + (f" (recipe {plan.recipe_sha256[:12]})" if plan.recipe_sha256 else ""))
        ledger = Ledger(out / LEDGER)
        failed: list[str] = []
        recorded: set[str] = set()
        done = 0
        log.start(len(jobs))
        try:
            results = contextlib.closing(_execute(jobs, workers=workers, client=client, log=log))
            by_name = {job["roi"]: job for job in jobs}
            with results as records:
                for record in records:
                    if record["status"] != "done":
                        _drop_stale_output(out, by_name.get(record["roi"]), record, log)
                    ledger.append(record)
                    if record["status"] == "done":
                        done += 1
                        recorded.add(record["roi"])
                    else:
                        failed.append(record["roi"])
                    log.finished(record)
                    if stop.is_set() or (cancel is not None and cancel.is_set()):
                        raise KeyboardInterrupt("interrupted")
        except KeyboardInterrupt:
            # the workers are stopped by now: outputs they finished but that were not recorded
            # are removed, so every stack in the folder is one the ledger vouches for
            for job in jobs:
                if job["output"] and job["roi"] not in recorded:
                    remove_path(out / job["output"])
            sweep_leftovers(out)
            log.line("interrupted: stopped; ROIs in flight were not recorded and will be redone")
            raise
        finally:
            log.stop()
        report = error = None
        try:
            write_quality_table(out)
            from .report import write_report

            report = write_report(out)
        except OutputError as exc:  # a full disk: the ROIs recorded stay recorded
            error = str(exc)
            log.line(f"error: {error}")
        error = error or log.error
        seconds = time.perf_counter() - started
        log.line(f"finished in {seconds:.1f} s: {done} done, {len(skipped)} skipped, "
                 f"{len(failed)} failed" + (f" ({', '.join(failed)})" if failed else "")
                 + (f"; report {report}" if report else ""))
    return RunSummary(out, done, len(skipped), len(failed), tuple(failed), seconds, report, error)


def _drop_stale_output(out: Path, job, record: dict, log) -> None:
    """A failed redo leaves no earlier washed stack under the ROI's output name; the record says so."""
    if not job or not job.get("output"):
        return
    stale = out / job["output"]
    if os.path.lexists(stale):
        remove_path(stale)
        record["stale_output_removed"] = job["output"]
        log.line(f"{record['roi']}: removed the earlier {job['output']}: its redo failed, "
                 "so it no longer matches the input or recipe")


def _connect(scheduler: str, timeout: float):
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


#: The demo data of a source checkout: ``example_stack/`` beside the ``qc`` folder.
DEMO_STACK = Path(__file__).resolve().parents[1] / "example_stack"


def run_demo(out_dir="plexwash-demo", *, stack=None, workers=None, progress=True) -> RunSummary:
    """The main job on the demo cohort: estimate spillover from its controls, run, report.

    Parameters
    ----------
    out_dir : str or Path
        The run folder (default ``plexwash-demo`` in the current folder).
    stack : str or Path, optional
        The demo folder (``cohort/``, ``controls/controls.csv``, ``panel.csv``); default
        ``example_stack/`` of the source checkout.
    workers : int, optional
        As in :func:`run_cohort`.
    progress : bool
        As in :func:`run_cohort`.

    Returns
    -------
    RunSummary

    Raises
    ------
    InputError
        When the demo folder is missing (an installed wheel has no ``example_stack``).
    """
    from .spillover import estimate_from_controls

    stack = Path(stack) if stack is not None else DEMO_STACK
    controls = stack / "controls" / "controls.csv"
    for needed in (stack / "cohort", controls, stack / "panel.csv"):
        if not needed.exists():
            raise InputError(needed, "demo data not found (it ships with the source checkout, "
                             "example_stack/)")
    matrix = estimate_from_controls(controls, panel=stack / "panel.csv")
    return run_cohort(stack / "cohort", out_dir, spillover=matrix, panel=stack / "panel.csv",
                      workers=workers, progress=progress)


@dataclasses.dataclass(frozen=True)
class _Plan:
    cohort_dir: Path
    out_dir: Path
    rois: list  # [(name, input path)]
    recipe_path: Path
    recipe_sha256: str
    output_settings: object
    spillover_path: Path | None
    spillover_sha256: str | None
    panel_path: Path | None
    panel_sha256: str | None


def _check_inputs(cohort_dir, out_dir, *, recipe, spillover, panel) -> dict:
    """Read and check everything a run needs, writing nothing."""
    from .io import list_cohort, output_name, read_panel, roi_stem
    from .recipe import Recipe, load_recipe

    cohort_dir = Path(cohort_dir).absolute()
    out = Path(out_dir).absolute()
    inputs = list_cohort(cohort_dir)
    if out.exists() and not out.is_dir():
        raise InputError(out, "output folder is a file")
    given = [cohort_dir, recipe if isinstance(recipe, (str, Path)) else None,
             spillover if isinstance(spillover, (str, Path)) else None,
             panel if isinstance(panel, (str, Path)) else None]
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    given.append(recipe.spillover_path())
    names: dict[str, Path] = {}
    for path in inputs:
        name = roi_stem(path)
        if name in names:
            raise InputError(path, f"two ROIs share the name {name!r} ({names[name].name}); "
                             "their outputs would collide")
        names[name] = path

    if panel is None and (cohort_dir / "panel.csv").is_file():
        panel = cohort_dir / "panel.csv"
    panel_text = None
    if panel is not None:
        panel_obj = panel if not isinstance(panel, (str, Path)) else read_panel(panel)
        panel_text = _panel_csv(panel_obj)
    check_run_folder(out, reached_inputs(given), [output_name(n, recipe.output) for n in names])
    return {"cohort_dir": cohort_dir, "out_dir": out, "rois": sorted(names.items()),
            "recipe": recipe, "matrix": _spillover_matrix(spillover, recipe),
            "panel_text": panel_text}


def check_run_folder(out: Path, inputs, roi_outputs) -> None:
    """Refuse a run folder that would overwrite an input or a file plexwash did not write.

    A folder an earlier run wrote (it holds the run lock) vouches for its log, ledger and
    the outputs its ledger records.
    """
    names = [LEDGER, RUN_LOG, QUALITY, REPORT, RECIPE, SPILLOVER_COPY, PANEL_COPY,
             *(p.name for p in interval_paths(SPILLOVER_COPY)), *roi_outputs]
    ours: list[str] = []
    if (out / _LOCK).is_file():
        ours = [LEDGER, RUN_LOG, *(r["output"] for r in read_ledger(out) if r.get("output"))]
        # the run's own hand-off copies may be given back to it (a rerun with its recipe):
        # they are read in full before the run rewrites them from what was read
        own = {os.path.realpath(out / n) for n in (RECIPE, SPILLOVER_COPY, PANEL_COPY)}
        own.update(os.path.realpath(p) for p in interval_paths(out / SPILLOVER_COPY))
        inputs = [p for p in inputs if os.path.realpath(p) not in own]
    check_output_folder(out, inputs, names, ours=ours)


def _write_run_files(inputs: dict) -> _Plan:
    """Write the self-contained recipe copy (and its spillover matrix and panel) of a run."""
    from .io import sha256_path
    from .recipe import load_recipe

    out, recipe, matrix, panel_text = (inputs[k] for k in ("out_dir", "recipe", "matrix", "panel_text"))
    spillover_path = panel_path = None
    changes = {"spillover": ""}
    if matrix is not None:
        from .spillover import write_spillover

        spillover_path = write_spillover(out / SPILLOVER_COPY, matrix)
        changes["spillover"] = SPILLOVER_COPY
    if panel_text is not None:
        panel_path = out / PANEL_COPY
        if not panel_path.is_file() or panel_path.read_text(encoding="utf-8") != panel_text:
            write_atomic(panel_path, panel_text)
    run_recipe = dataclasses.replace(recipe.replace("compensation", **changes), source=out / RECIPE)
    text = run_recipe.to_toml()
    if not (out / RECIPE).is_file() or (out / RECIPE).read_text(encoding="utf-8") != text:
        write_atomic(out / RECIPE, text)
    if load_recipe(out / RECIPE).sha256() != run_recipe.sha256():  # the copy must say the same
        raise RuntimeError("the written recipe does not read back identically")
    return _Plan(
        cohort_dir=inputs["cohort_dir"], out_dir=out, rois=inputs["rois"], recipe_path=out / RECIPE,
        recipe_sha256=run_recipe.sha256(), output_settings=run_recipe.output,
        spillover_path=spillover_path,
        spillover_sha256=sha256_path(spillover_path) if spillover_path else None,
        panel_path=panel_path, panel_sha256=sha256_path(panel_path) if panel_path else None)


def _spillover_matrix(spillover, recipe):
    """The spillover matrix to use (read and checked), or None without compensation."""
    from .spillover import SpilloverMatrix, check_spillover, read_spillover

    if not recipe.compensation.enabled:
        return None
    if spillover is None:
        spillover = recipe.spillover_path()
    if spillover is None:
        return None
    if isinstance(spillover, SpilloverMatrix):
        check_spillover(spillover)
        return spillover
    return read_spillover(spillover)


def _panel_csv(panel) -> str:
    import csv
    import io

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["channel", "label", "use"])
    for channel, label, use in zip(panel.channels, panel.labels, panel.use, strict=True):
        writer.writerow([channel, label, "yes" if use else "no"])
    return buffer.getvalue()


def _plan_jobs(plan: _Plan, log) -> tuple[list[dict], list[str]]:
    """The ROIs to wash (as job dicts) and the names of those that can be skipped."""
    from .io import output_name, sha256_path

    latest = latest_records(read_ledger(plan.out_dir))
    jobs, skipped = [], []
    enabled = plan.output_settings.enabled
    for name, path in plan.rois:
        output = output_name(name, plan.output_settings) if enabled else None
        job = {
            "roi": name, "input": str(path), "out_dir": str(plan.out_dir), "output": output,
            "recipe": str(plan.recipe_path), "recipe_sha256": plan.recipe_sha256,
            "spillover": str(plan.spillover_path) if plan.spillover_path else None,
            "spillover_sha256": plan.spillover_sha256,
            "panel": str(plan.panel_path) if plan.panel_path else None,
            "panel_sha256": plan.panel_sha256, "input_sha256": None, "threads": None,
        }
        record = latest.get(name)
        why = _why_redo(record, job)
        if why is None:
            job["input_sha256"] = sha256_path(path)
            if job["input_sha256"] != record.get("input_sha256"):
                why = "input changed"
            elif output is not None and sha256_path(plan.out_dir / output) != record.get("output_sha256"):
                why = "output changed or torn"
        if why is None:
            skipped.append(name)
            continue
        if record is not None:
            log.line(f"{name}: redo ({why})")
        jobs.append(job)
    return jobs, skipped


def _why_redo(record: Mapping | None, job: Mapping) -> str | None:
    """Why an earlier record does not cover the job (None: it may, if the hashes still match)."""
    if record is None:
        return "not washed yet"
    if record.get("status") != "done":
        return f"last attempt {record.get('status')}"
    for key, what in (("recipe_sha256", "recipe"), ("spillover_sha256", "spillover matrix"),
                      ("panel_sha256", "panel"), ("output", "output format")):
        if record.get(key) != job[key]:
            return f"{what} changed"
    if record.get("version") != __version__:
        return "plexwash version changed"
    if job["output"] is not None and not (Path(job["out_dir"]) / job["output"]).exists():
        return "output missing"
    return None


# --------------------------------------------------------------------------- execution


def _execute(jobs: list[dict], *, workers, client, log) -> Iterable[dict]:
    """Run the jobs and yield their ledger records as they finish."""
    if not jobs:
        return
    if workers is None and client is None:
        yield from _execute_here(jobs)
        return
    yield from _execute_on_cluster(jobs, workers=workers, client=client, log=log)


def _execute_here(jobs: list[dict]) -> Iterable[dict]:
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
                yield wash_one({**job, "threads": threads})
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _execute_on_cluster(jobs: list[dict], *, workers, client, log) -> Iterable[dict]:
    """Whole ROIs as tasks on a dask.distributed cluster (local processes or a running one)."""
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError:  # pragma: no cover - the cluster extra is not installed
        raise InputError("--workers" if workers else "--scheduler",
                         "needs dask.distributed (pip install 'plexwash[cluster]')") from None

    cluster = None
    cpus = _cpu_count()
    if workers is not None:
        workers = int(workers)
        threads = max(1, cpus // workers)
        env = {"OMP_NUM_THREADS": str(threads), "OMP_WAIT_POLICY": "PASSIVE",
               "NUMBA_NUM_THREADS": str(threads), "OPENBLAS_NUM_THREADS": str(threads),
               "MKL_NUM_THREADS": str(threads)}
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               host="127.0.0.1", dashboard_address=None, env=env)
        client = Client(cluster)
        log.line(f"started a local cluster: {workers} worker process(es), {threads} thread(s) each")
        for job in jobs:
            job["threads"] = threads
    else:  # joined before the run folder was touched (run_cohort)
        log.line(f"joined the dask cluster at {client.scheduler.address} "
                 f"({len(client.scheduler_info().get('workers', {}))} worker(s))")
    futures = {}
    try:
        for job in jobs:
            key = f"plexwash-wash-{job['roi']}-{os.urandom(4).hex()}"
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
        if cluster is not None:
            cluster.close()


def wash_one(job: Mapping) -> dict:
    """Wash one ROI of a run and return its ledger record (never raises for a bad ROI).

    Reads the input, washes it with the run's recipe, writes the washed stack atomically,
    hashes it and measures quality on raw and washed. Runs in this process or on a dask
    worker (the job holds only paths and hashes, so it pickles small).

    Parameters
    ----------
    job : mapping
        ``roi, input, out_dir, output, recipe, recipe_sha256, spillover,
        spillover_sha256, panel, panel_sha256, input_sha256, threads`` as planned by
        :func:`run_cohort`.

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
    out_dir = Path(job["out_dir"])
    written: list[Path] = []
    try:
        threads = job.get("threads") or _worker_threads()
        config = {"scheduler": "threads"}
        if dask.config.get("pool", None) is None:
            config["num_workers"] = threads
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


def _wash_and_measure(job: Mapping, out_dir: Path, written: list) -> dict:
    from .io import read_roi, sha256_path
    from .recipe import load_recipe
    from .wash import wash_to_file

    timings = {}
    clock = time.perf_counter()

    def lap(name):
        nonlocal clock
        now = time.perf_counter()
        timings[name] = round(now - clock, 3)
        clock = now

    input_sha256 = job.get("input_sha256") or sha256_path(job["input"])
    lap("hash_input")
    recipe = load_recipe(job["recipe"])
    if recipe.sha256() != job["recipe_sha256"]:
        raise InputError(job["recipe"], "recipe changed while the run was going")
    roi = read_roi(job["input"], panel=job.get("panel"))
    recipe.check_size(roi)
    matrix = None
    if job.get("spillover"):
        from .spillover import read_spillover

        matrix = read_spillover(job["spillover"])
    lap("read")
    if job["output"] is not None:
        target = out_dir / job["output"]
    else:  # quality only: the washed stack lives under a temporary name until measured
        from .io import output_name

        target = temporary_path(out_dir / output_name(job["roi"]), "measure")
    result = wash_to_file(roi, target, recipe, spillover=matrix)
    written.append(target)
    release_memory()
    lap("wash_write")
    output_sha256 = sha256_path(target) if job["output"] is not None else None
    lap("hash_output")
    raw_rows, washed_rows, roi_flags = _measure_quality(
        roi, target, recipe, matrix, threads=job.get("threads") or _worker_threads())
    release_memory()
    lap("quality")
    if job["output"] is None:
        remove_path(target)
    stats = json_ready(result.get("stats", {}))
    removed = {step: {row["channel"]: row.get("removed_fraction") for row in rows}
               for step, rows in stats.items()}
    shape = [int(n) for n in roi.shape]
    record = _base_record(job)
    record.update(
        status="done", input_sha256=input_sha256, output=job["output"],
        output_sha256=output_sha256, shape=shape, dtype=str(roi.data.dtype),
        channels=list(roi.channels), labels=list(roi.labels), used=[bool(u) for u in roi.use],
        removed_fraction=removed, steps=stats, notes=list(result.get("notes", [])),
        roi_flags=roi_flags, median_sbr=_median_sbr(raw_rows, washed_rows),
        timings=timings, quality=json_ready(raw_rows + washed_rows))
    return record


def _measure_quality(roi, washed_path: Path, recipe, matrix, *, threads: int = 1):
    """Quality rows of the raw ROI and of the washed stack as written (quality.measure_roi)."""
    from .io import read_roi
    from .quality import measure_roi

    measured = measure_roi(roi, recipe, spillover=matrix, washed=read_roi(washed_path).data, threads=threads)
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


def _worker_threads() -> int:
    """Threads for one ROI's chunks on a dask worker: its cores shared by its task slots."""
    try:
        from distributed import get_worker

        slots = get_worker().state.nthreads
    except (ImportError, ValueError, AttributeError):
        slots = 1
    return max(1, _cpu_count() // max(1, slots))


def _base_record(job: Mapping) -> dict:
    return {
        "roi": job["roi"], "status": None, "input": job["input"],
        "input_sha256": job.get("input_sha256"), "output": None, "output_sha256": None,
        "recipe_sha256": job["recipe_sha256"], "spillover_sha256": job.get("spillover_sha256"),
        "panel_sha256": job.get("panel_sha256"), "version": __version__,
        "host": socket.gethostname(), "pid": os.getpid(),
    }


def _failed_record(job: Mapping, exc: BaseException, *, seconds: float, started: str) -> dict:
    record = _base_record(job)
    if isinstance(exc, (InputError, OutputError)):
        error = str(exc)
    else:
        error = f"{exc.__class__.__name__}: {exc}"
        record["traceback"] = "".join(traceback.format_exception(exc))[-4000:]
    record.update(status="failed", error=" ".join(error.split()), seconds=round(seconds, 3),
                  started=started, finished=_now())
    return record


@contextlib.contextmanager
def _run_lock(out_dir: Path):
    """An exclusive lock on the run folder; the kernel drops it if the process dies."""
    out_dir.mkdir(parents=True, exist_ok=True)
    fh = open(out_dir / _LOCK, "a")
    try:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise InputError(out_dir, "another plexwash run is writing into this folder") from None
        yield
    finally:
        fh.close()


@contextlib.contextmanager
def _interrupts():
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


# --------------------------------------------------------------------------- quality table


def quality_table(out_dir) -> list[dict]:
    """Quality rows of a run folder: every done ROI's raw and washed rows, outliers flagged.

    Rows come from each ROI's latest ``done`` ledger record.
    Cohort outliers are judged per channel and stage on log(SBR) with the modified
    z-score (``|M| > 3.5``, once the cohort has ``OUTLIER_MIN_ROIS`` ROIs); ``flags``
    gains ``outlier`` and every row carries ``sbr_modified_z``. Washed rows also carry
    each step's removed fraction.
    """
    from .quality import add_outlier_flags

    latest = latest_records(read_ledger(out_dir))
    rows = []
    for name in sorted(latest):
        record = latest.get(name)
        if record is None or record.get("status") != "done":
            continue
        removed = record.get("removed_fraction") or {}
        for row in record.get("quality", []):
            row = dict(row)
            if row.get("stage") == "washed":
                for step, values in removed.items():
                    row[f"removed_{step}"] = values.get(row["channel"])
            rows.append(row)
    if not rows:
        return []
    enough = len({row["roi"] for row in rows}) >= OUTLIER_MIN_ROIS
    flagged = add_outlier_flags(rows, metric=OUTLIER_METRIC, log_scale=True,
                                cutoff=OUTLIER_CUTOFF if enough else math.inf)
    for row in flagged:
        row["sbr_modified_z"] = row.pop("modified_z")
    return flagged


def write_quality_table(out_dir) -> Path:
    """Write ``quality.csv`` of a run folder from its ledger, atomically."""
    rows = quality_table(out_dir)
    path = Path(out_dir) / QUALITY
    write_atomic(path, quality_csv_text(rows))
    return path


def quality_csv_text(rows: list[Mapping]) -> str:
    """Quality rows as CSV text: the contract columns first, lists joined by ``;``."""
    import csv
    import io

    columns = list(QUALITY_FIRST_COLUMNS)
    for row in rows:
        columns.extend(k for k in row if k not in columns)
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([_csv_cell(row.get(c)) for c in columns])
    return buffer.getvalue()


def read_quality_csv(path) -> list[dict]:
    """Read ``quality.csv`` back (numbers as float, flags as lists)."""
    import csv

    path = Path(path)
    if not path.is_file():
        return []
    with open(path, encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    out = []
    for row in rows:
        parsed = {}
        for key, value in row.items():
            if key == "flags":
                parsed[key] = [f for f in (value or "").split(";") if f]
            elif key in ("roi", "channel", "label", "stage", "ghost_sources",
                         "striped_rows", "striped_columns"):
                parsed[key] = value
            else:
                parsed[key] = _parse_number(value)
        out.append(parsed)
    return out


def _parse_number(text):
    if text is None or text == "":
        return None
    try:
        return float(text)
    except ValueError:
        return text


def _csv_cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, (list, tuple)):
        return ";".join(str(v) for v in value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)


# --------------------------------------------------------------------------- small helpers


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


# --------------------------------------------------------------------------- progress


class _RunLog:
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
        self.line(f"{what} [{self._finished}/{self._total}, about {_duration(eta)} left]")
        if self._bar is not None:
            self._bar.update(self._task, advance=1, last=record["roi"])

    def stop(self) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, seconds = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"
