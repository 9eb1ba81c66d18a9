"""The run of a cohort: :func:`run_cohort` and what it returns (:class:`RunSummary`).

It checks the inputs (writing nothing), joins a scheduler when asked, locks the run folder,
plans the jobs against the ledger, executes them, appends each ROI's record as it
finishes, and rebuilds ``quality.csv`` and ``report.html`` at the end. See
:mod:`plexwash.qc.run` for what the folder holds and how resume and interrupts behave.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from pathlib import Path

from .._version import __version__
from ..errors import InputError, OutputError
from ..files import remove_path, sweep_leftovers, write_atomic
from ..ledger import LEDGER, QUALITY, RECIPE, REPORT, RUN_LOG, STAINS_COPY, Ledger, repair_ledger
from ..table import SAMPLES_COPY, write_quality_table
from .execute import connect, execute, start_early
from .folder import interrupts, run_lock
from .plan import Job, check_inputs, plan_jobs, write_run_files
from .progress import RunLog

EXIT_OK, EXIT_ERROR, EXIT_SOME_FAILED = 0, 1, 3


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


def run_cohort(cohort_dir, out_dir, *, recipe=None, spillover=None, stains=None, samples=None,
               workers=None, scheduler=None, connect_timeout=5.0, progress=True, cancel=None,
               staging_dir=None, verify=False) -> RunSummary:
    """Wash every ROI of a cohort folder into a run folder, resuming an earlier run.

    Parameters
    ----------
    cohort_dir : str or Path
        Folder of ROIs (``.ome.tiff``, ``.tiff`` with a stain sheet, ``.ome.zarr``).
    out_dir : str or Path
        The run folder (created when missing). Rerunning into the same folder resumes.
    recipe : Recipe, str or Path, optional
        The recipe (or its TOML file); defaults apply when omitted.
    spillover : str, Path or SpilloverMatrix, optional
        Spillover matrix CSV; overrides the recipe's ``[compensation] spillover``.
    stains : str, Path or StainSheet, optional
        ``stains.csv``; by default ``stains.csv`` inside the cohort folder when present.
    samples : str, Path or SampleSheet, optional
        ``samples.csv`` (``file,batch[,...]``); by default ``samples.csv`` inside the cohort
        folder when present. Its columns are carried into the ledger, ``quality.csv`` and the
        report; a ``spillover`` column names a matrix per batch.
    workers : int, optional
        Wash on this many worker processes of this machine (default: one per core for
        small ROIs, else in this process; see :mod:`plexwash.qc.run.pool`).
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
    staging_dir : str or Path, optional
        Folder for the staging files of the wash (e.g. a node's local scratch disk when
        the run folder is on network storage); by default beside each output.
    verify : bool
        On resume, re-hash the input and output of every ROI recorded done and redo those
        whose SHA-256 no longer matches the ledger. By default a finished ROI is skipped
        when its input and output keep the size and modification time recorded (no file
        is read): a file changed in place that keeps both is only caught with ``verify``.

    Returns
    -------
    RunSummary
        ``exit_code`` is 0 when every ROI is done and 3 when some failed.

    Raises
    ------
    InputError
        Missing or empty cohort, output folder that is the cohort or not writable, bad
        recipe, spillover or stains, both ``workers`` and ``scheduler`` given, unreachable
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
    inputs = check_inputs(cohort_dir, out_dir, recipe=recipe, spillover=spillover, stains=stains,
                          samples=samples)
    out = inputs.out_dir
    client = connect(scheduler, connect_timeout) if scheduler is not None else None
    if not (out / LEDGER).exists():  # a rerun: the plan decides what is left (execute starts the pool)
        start_early([path for _, path in inputs.rois], workers=workers, client=client)
    with contextlib.ExitStack() as stack:
        if client is not None:
            stack.callback(client.close)
        stack.enter_context(run_lock(out))
        return _run_locked(inputs, out, started=started, workers=workers, client=client,
                           progress=progress, cancel=cancel, staging_dir=staging_dir, verify=verify)


def _run_locked(inputs, out: Path, *, started, workers, client, progress, cancel,
                staging_dir, verify) -> RunSummary:
    """The run, once its folder is locked (see :func:`run_cohort`)."""
    with RunLog(out / RUN_LOG, progress=progress) as log, interrupts() as stop:
        removed = sweep_leftovers(out)
        if removed:
            log.line(f"removed {len(removed)} leftover temporary file(s) of an interrupted run")
        if repair_ledger(out / LEDGER):
            log.line(f"removed the torn last line of {LEDGER} (a run was killed while writing it)")
        plan = write_run_files(inputs)
        jobs, skipped = plan_jobs(plan, log, staging_dir=staging_dir, verify=verify)
        log.line(f"plexwash {__version__} run of {plan.cohort_dir} into {out}: {len(plan.rois)} ROI(s), "
                 f"{len(skipped)} already done, {len(jobs)} to wash"
                 + (f" (recipe {plan.recipe_sha256[:12]})" if plan.recipe_sha256 else ""))
        ledger = Ledger(out / LEDGER)
        failed: list[str] = []
        recorded: set[str] = set()
        done = 0
        log.start(len(jobs))
        try:
            results = contextlib.closing(execute(jobs, workers=workers, client=client, log=log))
            by_name = {job.roi: job for job in jobs}
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
                if job.output and job.roi not in recorded:
                    remove_path(out / job.output)
            sweep_leftovers(out)
            log.line("interrupted: stopped; ROIs in flight were not recorded and will be redone")
            raise
        finally:
            log.stop()
        report = error = None
        try:
            if not jobs and _closing_files_current(out):  # a resume with nothing to do
                report = out / REPORT
                log.line(f"nothing new: {QUALITY} and {REPORT} already hold every ROI, kept")
            else:  # the report and the hand-off files load numpy, scipy, matplotlib: only here
                from ..report import write_report
                from .handoff import write_run_handoff

                write_quality_table(out)
                for line in write_run_handoff(out):  # audit.csv, composites, arcsinh stacks
                    log.line(line)
                report = write_report(out)  # the run's one call into the report
                write_atomic(out / CLOSING, _closing_signature(out))
        except OutputError as exc:  # a full disk: the ROIs recorded stay recorded
            error = str(exc)
            log.line(f"error: {error}")
        error = error or log.error
        seconds = time.perf_counter() - started
        log.line(f"finished in {seconds:.1f} s: {done} done, {len(skipped)} skipped, "
                 f"{len(failed)} failed" + (f" ({', '.join(failed)})" if failed else "")
                 + (f"; report {report}" if report else ""))
    return RunSummary(out, done, len(skipped), len(failed), tuple(failed), seconds, report, error)


#: Beside the closing files: the state of what they were made from (see _closing_signature).
CLOSING = ".closing-inputs"


def _closing_signature(out: Path) -> str:
    """What the closing step reads: the ledger's size and modification time, and the content
    (SHA-256, or absence) of the run's small copies of the recipe, stain sheet, sample sheet
    and matrices (rewritten with the same content on every run)."""
    import hashlib

    stat = (out / LEDGER).stat()
    parts = [f"{LEDGER} {stat.st_size} {stat.st_mtime_ns}"]
    for name in [RECIPE, STAINS_COPY, SAMPLES_COPY] + sorted(p.name for p in out.glob("spillover*.csv")):
        try:
            parts.append(f"{name} {hashlib.sha256((out / name).read_bytes()).hexdigest()}")
        except OSError:
            parts.append(f"{name} absent")
    return "\n".join(parts) + "\n"


def _closing_files_current(out: Path) -> bool:
    """True when ``quality.csv`` and ``report.html`` exist and were made from the ledger and
    run copies as they are now (a dropped sample sheet or a new record makes them stale)."""
    try:
        if not all((out / name).is_file() for name in (QUALITY, REPORT)):
            return False
        return (out / CLOSING).read_text(encoding="utf-8") == _closing_signature(out)
    except OSError:
        return False


def _drop_stale_output(out: Path, job: Job | None, record: dict, log) -> None:
    """A failed redo leaves no earlier washed stack under the ROI's output name; the record says so."""
    if not job or not job.output:
        return
    stale = out / job.output
    if os.path.lexists(stale):
        remove_path(stale)
        record["stale_output_removed"] = job.output
        log.line(f"{record['roi']}: removed the earlier {job.output}: its redo failed, "
                 "so it no longer matches the input or recipe")
