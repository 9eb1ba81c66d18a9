"""docs/walkthrough.ipynb runs from top to bottom (executed with nbclient)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

NOTEBOOK = Path(__file__).resolve().parents[1] / "docs" / "walkthrough.ipynb"


@pytest.mark.slow
def test_walkthrough_executes(demo_dir):
    notebook = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(notebook, timeout=300, kernel_name="python3",
                                     resources={"metadata": {"path": str(NOTEBOOK.parent)}})
    client.execute()
    outputs = [o for cell in notebook.cells if cell.cell_type == "code" for o in cell.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    text = "".join(o.get("text", "") for o in outputs if o.get("output_type") == "stream")
    assert "largest true entry" in text and "removed" in text
    images = [o for o in outputs if "image/png" in o.get("data", {})]
    studio = bool(os.environ.get("DISPLAY"))
    assert len(images) == (3 if studio else 2)  # heatmap, raw | washed | removed, (+ the studio)
