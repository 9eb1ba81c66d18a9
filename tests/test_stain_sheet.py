"""The stain sheet's optional ``role`` column (segmentation hand-off) and its refusals."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from plexwash.qc import read_roi
from plexwash.qc.errors import InputError
from plexwash.qc.io import read_stains, write_ome_tiff

TAGS = ["Nd145", "Nd146", "Ir191"]


@pytest.fixture
def roi_path(tmp_path):
    path = tmp_path / "r.ome.tiff"
    write_ome_tiff(path, np.ones((3, 16, 16), np.float32), TAGS)
    return path


def write_sheet(folder, rows, header="tag,marker,wash,role"):
    path = folder / "stains.csv"
    path.write_text(header + "\n" + "".join(",".join(r) + "\n" for r in rows))
    return path


def test_roles_are_read_and_follow_the_image_channel_order(tmp_path, roi_path):
    # rows in another order than the image: roles travel with their tag
    sheet = write_sheet(tmp_path, [("Ir191", "DNA", "yes", "nuclear"), ("Nd146", "CD8", "yes", ""),
                                   ("Nd145", "E-cadherin", "yes", "Membrane")])
    assert read_stains(sheet).roles == ("nuclear", "", "membrane")
    roi = read_roi(roi_path, stains=sheet)
    assert roi.roles == ("membrane", "", "nuclear")
    assert roi.labels == ("E-cadherin", "CD8", "DNA")


def test_without_a_role_column_every_role_is_empty(tmp_path, roi_path):
    sheet = write_sheet(tmp_path, [(t, t.lower(), "yes") for t in TAGS], header="tag,marker,wash")
    assert read_stains(sheet).roles == ("", "", "")
    assert read_roi(roi_path, stains=sheet).roles == ("", "", "")
    assert read_roi(roi_path).roles == ("", "", "")


@pytest.mark.parametrize("rows, problem", [
    ([("Nd145", "A", "yes", "nucleus")], "role must be nuclear or membrane or empty"),
    ([("Ir191", "DNA", "no", "nuclear")], "Ir191 has role nuclear but wash = no"),
])
def test_bad_roles_name_the_file_and_row(tmp_path, rows, problem):
    sheet = write_sheet(tmp_path, rows)
    with pytest.raises(InputError) as caught:
        read_stains(sheet)
    assert str(sheet) in str(caught.value) and "row 2" in str(caught.value)
    assert problem in str(caught.value)


def test_cli_refuses_a_role_on_an_unwashed_channel_in_one_line(tmp_path, roi_path):
    sheet = write_sheet(tmp_path, [("Nd145", "A", "yes", ""), ("Nd146", "B", "yes", ""),
                                   ("Ir191", "DNA", "no", "nuclear")])
    out = tmp_path / "out.ome.tiff"
    done = subprocess.run([sys.executable, "-m", "plexwash.qc.cli", "wash", str(roi_path), "-o", str(out),
                           "--stains", str(sheet)], capture_output=True, text=True)
    assert done.returncode == 2
    assert done.stderr.strip().count("\n") == 0 and "Traceback" not in done.stderr
    assert "wash = no" in done.stderr and not out.exists()


def test_the_run_keeps_the_roles_in_its_copy_of_the_sheet(tmp_path, roi_path):
    from plexwash.qc.run import run_cohort

    cohort = roi_path.parent
    write_sheet(cohort, [("Nd145", "A", "yes", "membrane"), ("Nd146", "B", "yes", ""),
                         ("Ir191", "DNA", "yes", "nuclear")])
    out = tmp_path.parent / (tmp_path.name + "-run")
    run_cohort(cohort, out, progress=False)
    copied = read_stains(out / "stains.csv")
    assert copied.roles == ("membrane", "", "nuclear")
