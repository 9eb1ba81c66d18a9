"""Soak: the studio survives well over a hundred random user actions with the live preview on.

Each cohort is driven in its own process (``tests/studio_soak.py``): a segmentation fault
there (the studio once died on the second ROI switch while the canvas drew) fails this
test with the process's output instead of killing pytest. The actions: ROI switches,
channel switches, Speckle setting changes with the live preview, the One / Grid /
Overlay / Preview views, live preview on and off, compensating the ROI, measuring its
quality; the next action often starts before the last one's background work is done.

The generated cohort is the issue's: 3 ROIs of 36 x 1000 x 1000 (100 actions each; about 2.6 minutes on two
shared cores at load 9, the demo cohort under one); ``benchmarks/studio_freezes.py`` times the same
actions on it.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = [pytest.mark.gui, pytest.mark.slow]

SCRIPT = Path(__file__).with_name("studio_soak.py")


def soak(args, timeout: float) -> str:
    env = dict(os.environ, OMP_WAIT_POLICY="PASSIVE")
    done = subprocess.run([sys.executable, str(SCRIPT), *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env=env)
    tail = (done.stdout + done.stderr)[-4000:]
    assert done.returncode == 0, f"the studio died (exit {done.returncode}):\n{tail}"
    return done.stdout


def test_soak_demo_cohort(demo_dir):
    out = soak([demo_dir / "cohort", "--matrix", demo_dir / "truth" / "spillover.csv", "--actions", 100,
                "--seed", 18], timeout=600)
    assert "survived 100 actions" in out


def test_soak_36_channel_cohort(tmp_path):
    out = soak([tmp_path, "--generate", "3,36,1000", "--actions", 100, "--seed", 36], timeout=600)
    assert "survived 100 actions" in out and "(36, 1000, 1000)" in out
