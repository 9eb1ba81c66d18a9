"""Pieces every benchmark uses: the example_stack modules and a median timer."""

from __future__ import annotations

import importlib.util
import statistics
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
