"""The npe2 manifest: it validates, and napari's plugin manager finds every contribution."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.plugin import WIDGETS

npe2 = pytest.importorskip("npe2")


@pytest.fixture(scope="module")
def manifest():
    return npe2.PluginManifest.from_distribution("plexwash")


def test_manifest_validates_and_imports(manifest):
    assert manifest.name == "plexwash"
    manifest.validate_imports()  # every python_name resolves (npe2's own check)


def test_manifest_lists_the_five_widgets(manifest):
    assert [w.display_name for w in manifest.contributions.widgets] == list(WIDGETS)


def test_plugin_manager_finds_reader_writer_sample_data(demo_dir):
    pm = npe2.PluginManager.instance()
    pm.discover()
    assert pm.get_manifest("plexwash").name == "plexwash"
    widgets = [w.display_name for w in pm.iter_widgets() if w.command.startswith("plexwash.")]
    assert widgets == list(WIDGETS)
    roi = demo_dir / "cohort" / "roi_01.ome.tiff"
    readers = [r.command for r in pm.iter_compatible_readers([str(roi)])]
    assert "plexwash.get_reader" in readers
    writer, _ = pm.get_writer("out.ome.tiff", ["image", "image"], plugin_name="plexwash")
    assert writer is not None and writer.command == "plexwash.write_stack"
    samples = dict(pm.iter_sample_data())["plexwash"]
    assert [s.key for s in samples] == ["demo_roi_01", "demo_roi_02"]


def test_read_and_write_through_npe2(demo_dir, tmp_path):
    from plexwash.qc import read_roi

    roi_path = demo_dir / "cohort" / "roi_02.ome.tiff"
    layers = npe2.read([str(roi_path)], stack=False, plugin_name="plexwash")
    roi = read_roi(roi_path, stains=demo_dir / "stains.csv")
    assert [meta["name"] for _, meta, _ in layers] == list(roi.labels)
    written = npe2.write(str(tmp_path / "copy.ome.tiff"), layers[:4], plugin_name="plexwash")
    back = read_roi(written[0])
    assert back.channels == roi.channels[:4]
    np.testing.assert_array_equal(np.asarray(back.data), roi.data[:4])
