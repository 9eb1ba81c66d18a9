"""Run a plexwash cohort on a SLURM cluster through dask-jobqueue (example script).

The script asks SLURM for dask workers (``dask_jobqueue.SLURMCluster``), waits until the
first ones have joined, then runs ``plexwash run COHORT -o OUT --scheduler ADDRESS``
against that cluster and shuts the workers down when the run ends. The run itself
(ledger, resume, report) happens in this process; the workers only wash ROIs.

Requirements
------------
- ``pip install 'plexwash[cluster]'`` (dask.distributed and dask-jobqueue) in an
  environment that the compute nodes can see (a shared file system or the same image);
- the cohort folder and the output folder on a file system shared by this machine and
  the nodes: every worker reads its ROI and writes its washed stack directly there.

How plexwash uses the workers
-----------------------------
One task is one whole ROI (read, wash, write, hash, measure). A worker with ``n``
threads runs ``n`` ROIs at the same time, each on one core (plexwash gives each task
``cores // threads`` threads for its chunks). The default below, ``processes=1`` per
job, therefore runs ``--cores`` ROIs per job in parallel; give each job enough memory
for that many ROIs at once (memory per ROI is bounded by chunks: about half the size
of one stack as float32, or less).

If the run is stopped (Ctrl-C, or SLURM's time limit sends SIGTERM), rerun the same
command: done ROIs are skipped, the others are washed again.

Examples
--------
Print the SLURM job script the workers would be started with, without submitting::

    python docs/cluster_jobqueue.py COHORT OUT --queue normal --dry-run

Run on 4 jobs of 8 cores and 32 GB each::

    python docs/cluster_jobqueue.py COHORT OUT --queue normal --account lab42 \\
        --jobs 4 --cores 8 --memory 32GB --walltime 04:00:00 --recipe recipe.toml
"""

from __future__ import annotations

import argparse
import shlex
import shutil
import subprocess
import sys
from pathlib import Path


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(description="Wash a cohort on SLURM workers started by dask-jobqueue.")
    parser.add_argument("cohort", type=Path, help="folder of ROIs (shared file system)")
    parser.add_argument("out", type=Path, help="run output folder (shared file system)")
    parser.add_argument("--recipe", type=Path, help="recipe TOML")
    parser.add_argument("--spillover", type=Path, help="spillover matrix CSV")
    parser.add_argument("--stains", type=Path, help="stain sheet (stains.csv: tag,marker,wash[,role])")
    parser.add_argument("--queue", help="SLURM partition")
    parser.add_argument("--account", help="SLURM account to charge")
    parser.add_argument("--jobs", type=int, default=2, help="SLURM jobs to start (default 2)")
    parser.add_argument("--cores", type=int, default=8, help="cores per job (default 8)")
    parser.add_argument("--memory", default="32GB", help="memory per job (default 32GB)")
    parser.add_argument("--walltime", default="02:00:00", help="time limit per job (default 2 h)")
    parser.add_argument("--interface", help="network interface of the nodes, e.g. ib0")
    parser.add_argument("--local-directory", default="$TMPDIR",
                        help="node-local scratch for dask's spill files (default $TMPDIR)")
    parser.add_argument("--log-directory", type=Path, help="folder for the SLURM job logs")
    parser.add_argument("--dry-run", action="store_true", help="print the job script and stop")
    return parser


def start_cluster(args):
    """A SLURMCluster with one worker process per job and ``--cores`` threads in it."""
    from dask_jobqueue import SLURMCluster

    options = {
        "cores": args.cores,
        "processes": 1,
        "memory": args.memory,
        "walltime": args.walltime,
        "local_directory": args.local_directory,
        # each ROI task runs on one core: keep BLAS and numba from starting more threads
        "job_script_prologue": [
            "export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 NUMBA_NUM_THREADS=1",
            "export OMP_WAIT_POLICY=PASSIVE",
        ],
    }
    if args.queue:
        options["queue"] = args.queue
    if args.account:
        options["account"] = args.account
    if args.interface:
        options["interface"] = args.interface
    if args.log_directory:
        options["log_directory"] = str(args.log_directory)
    return SLURMCluster(**options)


def plexwash_command(args, address: str) -> list[str]:
    """The ``plexwash run`` command line pointed at the cluster's scheduler."""
    exe = shutil.which("plexwash")
    command = [exe] if exe else [sys.executable, "-c",
                                 "import sys; from plexwash.qc.cli import main; sys.exit(main())"]
    command += ["run", str(args.cohort), "-o", str(args.out), "--scheduler", address]
    if args.recipe:
        command += ["--recipe", str(args.recipe)]
    if args.spillover:
        command += ["--spillover", str(args.spillover)]
    if args.stains:
        command += ["--stains", str(args.stains)]
    return command


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    cluster = start_cluster(args)
    try:
        if args.dry_run:
            print(cluster.job_script())
            print("# then: " + shlex.join(plexwash_command(args, cluster.scheduler_address)))
            return 0
        from distributed import Client

        cluster.scale(jobs=args.jobs)
        with Client(cluster) as client:
            print(f"waiting for the first worker at {cluster.scheduler_address} "
                  f"({args.jobs} job(s) of {args.cores} cores requested) ...", flush=True)
            client.wait_for_workers(1)
            command = plexwash_command(args, cluster.scheduler_address)
            print("running: " + shlex.join(command), flush=True)
            # exit status of plexwash run: 0 all done, 3 some ROIs failed (see the ledger)
            return subprocess.call(command)
    finally:
        cluster.close()


if __name__ == "__main__":
    sys.exit(main())
