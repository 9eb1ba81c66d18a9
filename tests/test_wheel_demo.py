"""The demo data ships in the wheel: `plexwash demo` and the napari sample data work installed."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_wheel_ships_the_demo_and_finds_it(tmp_path):
    build = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                            "-q", "-w", str(tmp_path / "dist"), str(ROOT)],
                           capture_output=True, text=True)
    if build.returncode != 0:
        pytest.fail(build.stderr[-2000:])
    wheel = next((tmp_path / "dist").glob("plexwash-*.whl"))
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        archive.extractall(tmp_path / "site")
    expected = {str(p.relative_to(ROOT)).replace("example_stack", "plexwash/example_stack", 1)
                for p in (ROOT / "example_stack").rglob("*")
                if p.is_file() and p.parent.name in ("cohort", "controls", "truth")}
    expected |= {"plexwash/example_stack/stains.csv"}
    assert expected <= names, sorted(expected - names)[:5]
    # the unpacked wheel first on the path: the engine finds its own copy, not the checkout's
    code = ("import sys; sys.path.insert(0, sys.argv[1]);"
            "from plexwash.qc.run.demo import demo_folder; from plexwash.qc import read_roi;"
            "f = demo_folder(); roi = read_roi(f / 'cohort' / 'roi_01.ome.tiff', stains=f / 'stains.csv');"
            "print(f); print(len(roi.channels), roi.labels[0])")
    shown = subprocess.run([sys.executable, "-c", code, str(tmp_path / "site")],
                           capture_output=True, text=True, cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr[-2000:]
    folder, summary = shown.stdout.splitlines()
    assert Path(folder).is_relative_to(tmp_path / "site")
    assert summary == "22 membrane-A"
