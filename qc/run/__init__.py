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
- ``recipe.toml`` (+ ``spillover.csv`` and ``stains.csv`` when used): the recipe exactly as
  applied, self-contained (its ``[compensation] spillover`` names the copy beside it);
- ``run.log``: timestamped progress lines of every run into this folder;
- ``audit.csv`` (exclusive pairs in the recipe), ``<roi>.composite.ome.tiff`` (roles in the
  stain sheet) and ``<roi>.arcsinh.ome.tiff`` (``[output] transform``): :mod:`.handoff`.

Scheduling
----------
The unit of work is one whole ROI: a task reads the ROI, washes it, writes the washed
stack atomically, measures quality on raw and on the washed pixels still at hand (no
read-back of the output), and hashes the output. Whole ROIs keep every
write local to the process that computed it (no pixels travel between processes), make a
task's result all-or-nothing, and let the ledger stay a single writer (this process).
Inside a task the ROI's chunks run on dask's threaded scheduler (one thread: in turn).

- default, small ROIs (:mod:`.pool`): with two or more ROIs to wash and two or more
  cores, ROIs whose pixels are at most ``pool.POOL_ROI_BYTES`` (64 MiB) are washed side
  by side on worker processes of this machine, one per core (fewer when half the
  available memory does not hold them), one ROI per worker at a time, each with
  ``cores // N`` threads; a small ROI is mostly Python (the GIL), so threads inside it
  cannot keep the cores busy. The workers start from a fork server that imported the
  engine once (Linux; spawned elsewhere);
- default, otherwise (one ROI, one core, large ROIs): in this process, one ROI after
  the other, each ROI's chunks on all cores;
- ``workers=N``: the same pool with N worker processes, whatever the ROIs' size;
- ``scheduler="tcp://host:port"``: join a running cluster (``Client(address)``); its
  workers must see the same paths (a shared file system).

The pixels do not depend on the scheduler or the number of workers: every ROI is washed
by the same code with the same chunking, whichever process runs it.

Resume and safety
-----------------
A rerun skips an ROI whose latest ledger record is ``done`` when its output still exists,
the input and output keep the size and modification time recorded beside their hashes
(``input_stamp``, ``output_stamp``; nothing is read), and the recipe, spillover matrix,
stains and plexwash version are unchanged; everything else is (re)done. With
``verify=True`` (``plexwash run --verify``) the input and output are re-hashed instead and
must match ``input_sha256`` and ``output_sha256``: a file changed in place that keeps its
size and modification time is only caught that way. Records without stamps (an older
plexwash) are always checked by their hashes. Outputs are written
under a temporary name and renamed, ledger lines are appended one at a time and fsynced,
so ``kill -9`` loses only the ROIs in flight; leftover temporary files are removed when
the next run starts. Ctrl-C (or SIGTERM) stops the run: nothing is recorded for the ROIs
in flight, their temporary files and any output they finished without being recorded are
removed, and ``KeyboardInterrupt`` propagates (worker processes of this machine are
stopped first, each removing its ROI's files; with a remote scheduler, a task already
running on a worker may still finish writing; the next run redoes it). A worker
process that dies gives its ROI a ``failed`` record. One
unreadable ROI is recorded ``failed`` with its error; the others go on; the exit code is
then 3. Inputs are only ever opened for reading. A lock file keeps two runs from writing
into the same folder at once.

Modules
-------
- :mod:`.cohort`: :func:`run_cohort`, :class:`RunSummary`, the order of a run;
- :mod:`.plan`: checking the inputs, the hand-off files, the jobs (:class:`~.plan.Job`)
  and the resume decisions;
- :mod:`.execute`: one ROI (:func:`~.execute.wash_one`), here, on the pool or on dask.distributed;
- :mod:`.pool`: the worker processes of this machine and when they are used;
- :mod:`.folder`: the output guard, the lock, interrupts, heap tuning;
- :mod:`.progress`: ``run.log`` and the progress bar;
- :mod:`.demo`: :func:`run_demo`.

The ledger (:mod:`plexwash.qc.ledger`) and the quality table (:mod:`plexwash.qc.table`)
live outside this package: the report reads them too, and the run calls the report.
"""

from .._lazy import lazy_names
from ..ledger import (
    LEDGER,
    QUALITY,
    RECIPE,
    REPORT,
    RUN_LOG,
    SPILLOVER_COPY,
    STAINS_COPY,
    Ledger,
    json_ready,
    latest_records,
    read_ledger,
    repair_ledger,
)
from ..table import (
    OUTLIER_CUTOFF,
    OUTLIER_MIN_ROIS,
    QUALITY_FIRST_COLUMNS,
    quality_csv_text,
    quality_table,
    read_quality_csv,
    write_quality_table,
)

# The run's own modules are imported on first use (PEP 562): the command line starts the
# workers' fork server (:func:`.pool.start_server`, standard library only) before the
# engine is imported, so the server's preload runs while this process imports and plans.
_WHERE = {
    **dict.fromkeys(("EXIT_ERROR", "EXIT_OK", "EXIT_SOME_FAILED", "RunSummary", "run_cohort"), ".cohort"),
    "DEMO_STACK": ".demo", "run_demo": ".demo",
    "measure_quality": ".execute", "wash_one": ".execute",
    **dict.fromkeys(("bound_heap", "check_run_folder", "release_memory"), ".folder"),
    "Job": ".plan",
}

__all__ = [
    "DEMO_STACK",
    "EXIT_ERROR",
    "EXIT_OK",
    "EXIT_SOME_FAILED",
    "LEDGER",
    "OUTLIER_CUTOFF",
    "OUTLIER_MIN_ROIS",
    "STAINS_COPY",
    "QUALITY",
    "QUALITY_FIRST_COLUMNS",
    "RECIPE",
    "REPORT",
    "RUN_LOG",
    "SPILLOVER_COPY",
    "Job",
    "Ledger",
    "RunSummary",
    "bound_heap",
    "check_run_folder",
    "json_ready",
    "latest_records",
    "measure_quality",
    "quality_csv_text",
    "quality_table",
    "read_ledger",
    "read_quality_csv",
    "release_memory",
    "repair_ledger",
    "run_cohort",
    "run_demo",
    "wash_one",
    "write_quality_table",
]

__getattr__, __dir__ = lazy_names(__name__, globals(), _WHERE)
