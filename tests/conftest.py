"""Shared fixtures: small synthetic stacks and the demo cohort's generator."""

from __future__ import annotations

import importlib.util
import os
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "example_stack"

# Two thread pools (BLAS and numba) fighting over two cores make everything slower.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")


def load_example_module(name: str):
    """A module of example_stack/ (generator, scorer), imported from its file: not packaged."""
    spec = importlib.util.spec_from_file_location(f"plexwash_demo_{name}", DEMO / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def load_generator():
    """The demo cohort generator (example_stack/generate.py)."""
    return load_example_module("generate")


@pytest.fixture(scope="session")
def generator():
    return load_generator()


@pytest.fixture(scope="session")
def demo_dir() -> Path:
    return DEMO


@pytest.fixture
def small_stack() -> np.ndarray:
    """Three channels of Poisson counts, 64 x 48 px (not square, to catch axis mix-ups)."""
    rng = np.random.default_rng(7)
    return rng.poisson(3.0, size=(3, 64, 48)).astype(np.float32)


@pytest.fixture
def small_roi(tmp_path, small_stack) -> Path:
    from plexwash.qc.io import write_ome_tiff

    path = tmp_path / "small.ome.tiff"
    write_ome_tiff(path, small_stack, ["Nd145", "Nd146", "Ir191"], pixel_size=(0.5, 0.5))
    return path


@pytest.fixture(scope="session")
def unseen():
    """An ROI and matrix the defaults were never tuned on: other random state, size, stains."""
    gen = load_generator()
    rng = np.random.default_rng(90210)
    names = ["Nd142", "Nd143", "Nd144", "Nd146", "Sm147", "Sm149", "Eu151", "Eu153", "Gd156",
             "Gd158", "Gd160", "Dy161", "Dy162", "Dy163", "Er166", "Er167", "Yb172", "Ir191"]
    stains = gen.random_stains(names, rng, failed="Gd158", dim="Dy163", rare="Er167", specks="Gd156")
    spill = gen.build_spillover(names, rng)
    counts, truth = gen.simulate_roi(rng, stains, spill, (330, 290))
    from plexwash.qc.io import Roi
    from plexwash.qc.spillover import SpilloverMatrix

    roi = Roi(counts, tuple(names), Path("unseen.ome.tiff"))
    return roi, SpilloverMatrix(tuple(names), spill), truth
