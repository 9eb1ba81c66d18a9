"""The studio's writer (npe2): marker names, provenance, and never over the ROI it came from."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile
from plexwash.plugin import _reader, _writer
from plexwash.qc import read_roi
from plexwash.qc.errors import InputError
from plexwash.qc.io import write_ome_tiff

TAGS = ["Nd145", "Nd146", "Ir191"]
MARKERS = ["CD3", "CD8", "DNA"]


@pytest.fixture
def roi_with_sheet(tmp_path):
    rng = np.random.default_rng(3)
    stack = rng.poisson(2.0, size=(3, 40, 56)).astype(np.float32)
    path = tmp_path / "r.ome.tiff"
    write_ome_tiff(path, stack, TAGS, pixel_size=(0.5, 0.5))
    (tmp_path / "stains.csv").write_text(
        "tag,marker,wash\n" + "".join(f"{t},{m},yes\n" for t, m in zip(TAGS, MARKERS, strict=True)))
    return path, stack


def test_writer_keeps_marker_names_and_records_provenance(tmp_path, roi_with_sheet):
    path, stack = roi_with_sheet
    layers = _reader.read_roi_layers(path)
    out = tmp_path / "out" / "saved.ome.tiff"
    out.parent.mkdir()
    written = _writer.write_washed_stack(str(out), layers)
    back = read_roi(written[0])
    assert list(back.channels) == TAGS and list(back.labels) == MARKERS
    np.testing.assert_array_equal(np.asarray(back.data), stack)
    # the OME-XML validates against the OME schema (ome_types, validate=True) and holds a
    # provenance MapAnnotation that names the studio and the source ROI
    ome_types = pytest.importorskip("ome_types")
    with tifffile.TiffFile(written[0]) as tif:
        ome = ome_types.from_xml(tif.ome_metadata, validate=True)
    maps = {m.k: m.value for ann in ome.structured_annotations.map_annotations
            if ann.namespace == "plexwash.provenance" for m in ann.value.ms}
    assert maps["software"] == "plexwash studio" and str(path) in maps["source"]
    assert maps["version"] and maps["date"]


def test_writer_refuses_the_roi_the_layers_came_from(roi_with_sheet):
    path, _ = roi_with_sheet
    before = path.read_bytes()
    with pytest.raises(InputError):
        _writer.write_washed_stack(str(path), _reader.read_roi_layers(path))
    assert path.read_bytes() == before
