"""Benchmark: the closing report of finished run folders, each written in a fresh process.

Run: ``python benchmarks/report_fresh.py RUN_FOLDER [RUN_FOLDER ...] [--repeats 3] [--baseline DIR]``

Each repeat starts a new Python process that imports the report, then times
``write_report`` (the report goes to a temporary file; the run folder is only read), so
the imports the report makes on its own (image readers, plotting libraries) are counted,
as they are at the end of ``plexwash run``. Prints the median of ``--repeats`` for this
checkout and, with ``--baseline DIR`` (a folder holding ``plexwash/qc`` of another
checkout, run with ``PYTHONPATH=DIR``), for the baseline, interleaved, with the ratio and
the load average: the machine may be shared, compare ratios taken in one run.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

#: Times write_report in the child process; prints its seconds as the last line.
CHILD = ("import sys, time\n"
         "from plexwash.qc.report import write_report\n"
         "started = time.perf_counter()\n"
         "write_report(sys.argv[1], output=sys.argv[2])\n"
         "print(time.perf_counter() - started)\n")


def _once(folder: Path, target: Path, pythonpath: str | None) -> float:
    env = dict(os.environ, OMP_WAIT_POLICY="PASSIVE")
    if pythonpath:
        env["PYTHONPATH"] = pythonpath
    done = subprocess.run([sys.executable, "-c", CHILD, str(folder), str(target)], env=env,
                          capture_output=True, text=True, check=True)
    return float(done.stdout.split()[-1])


def _load() -> str:
    return " ".join(f"{v:.2f}" for v in os.getloadavg())


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folders", nargs="+", type=Path, help="finished plexwash run folders")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--baseline", type=Path, help="folder holding another checkout as plexwash/qc")
    args = parser.parse_args(argv)
    print(f"before: load average {_load()} on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory() as tmp:
        target = Path(tmp) / "report.html"
        for folder in args.folders:
            ours, base = [], []
            for _ in range(args.repeats):
                ours.append(_once(folder, target, None))
                if args.baseline:
                    base.append(_once(folder, target, str(args.baseline)))
            line = (f"{folder}: write_report in a fresh process, this checkout median "
                    f"{statistics.median(ours):.3f} s (runs {', '.join(f'{t:.3f}' for t in ours)})")
            if base:
                line += (f"; baseline median {statistics.median(base):.3f} s (runs "
                         f"{', '.join(f'{t:.3f}' for t in base)}); this / baseline = "
                         f"{statistics.median(ours) / statistics.median(base):.2f}x")
            print(line)
    print(f"after: load average {_load()} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
