"""Pieces every benchmark uses: the example_stack modules, a median timer, a display."""

from __future__ import annotations

import importlib.util
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def load_example(name: str):
    """A module of example_stack/ (``generate``, ``score``), imported from its file."""
    spec = importlib.util.spec_from_file_location(f"plexwash_demo_{name}", ROOT / "example_stack" / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def load_generator():
    """The demo cohort generator (example_stack/generate.py)."""
    return load_example("generate")


def median_time(fn, repeats: int) -> float:
    """Median wall time of ``repeats`` calls of ``fn`` (the machine is shared and noisy)."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def rerun_under_xvfb(script: str, argv: list[str]) -> int | None:
    """Run ``script`` again under ``xvfb-run`` when there is no display; None when there is one.

    Returns the child's exit code (2 when neither a display nor ``xvfb-run`` exists).
    ``QT_QPA_PLATFORM`` is dropped: the offscreen platform renders black under Xvfb.
    """
    if os.environ.get("DISPLAY") or os.environ.get("PLEXWASH_BENCH_CHILD"):
        return None
    if shutil.which("xvfb-run") is None:
        print("error: no display and no xvfb-run; run under an X server", file=sys.stderr)
        return 2
    env = dict(os.environ, PLEXWASH_BENCH_CHILD="1")
    env.pop("QT_QPA_PLATFORM", None)
    command = ["xvfb-run", "-a", "-s", "-screen 0 1600x1200x24", sys.executable, script, *argv]
    return subprocess.call(command, env=env)
