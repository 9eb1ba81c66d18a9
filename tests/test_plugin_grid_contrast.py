"""The grid picture follows napari's own contrast sliders: moving a channel layer's contrast
while the grid is shown redraws that channel's tile (and only it). Under Xvfb."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.plugin._layers import GRID_LAYER, studio_layers

from .test_plugin_widgets import WAIT_MS, cohort, open_first_roi  # noqa: F401  (cohort: a fixture)

pytestmark = pytest.mark.gui


def tile_of(picture, box, shape):
    y0, x0 = (int(round(v)) for v in np.asarray(box[0]) / np.asarray(picture.scale))
    return picture.data[y0:y0 + shape[0], x0:x0 + shape[1]].astype(float)


def test_grid_picture_follows_contrast_sliders(make_napari_viewer, qtbot, cohort):  # noqa: F811
    viewer = make_napari_viewer()
    widget = open_first_roi(qtbot, viewer, cohort)
    widget.set_view("grid")
    picture, labels = viewer.layers[GRID_LAYER], viewer.layers["plexwash grid labels"]
    raw = studio_layers(viewer, stage="raw")
    boxes = list(labels.data)
    before = [tile_of(picture, box, layer.data.shape) for box, layer in zip(boxes, raw, strict=True)]
    moved = raw[2]
    lo, hi = moved.contrast_limits
    viewer.layers.selection.active = moved  # the layer controls now show its slider
    moved.contrast_limits = (lo, lo + 0.25 * (hi - lo))  # what dragging the slider's top does
    qtbot.waitUntil(lambda: not widget.busy(), timeout=WAIT_MS)
    qtbot.wait(50)
    picture = viewer.layers[GRID_LAYER]
    after = [tile_of(picture, box, layer.data.shape) for box, layer in zip(boxes, raw, strict=True)]
    for k, (old, new) in enumerate(zip(before, after, strict=True)):
        if k != 2:
            np.testing.assert_array_equal(old, new)  # the other tiles as they were
    # the moved tile: its channel scaled by the new contrast, in its hue (a colormap black -> hue
    # is linear: napari's Colormap interpolation between its two colours)
    colour = np.asarray(moved.colormap.colors[-1][:3])
    level = np.clip((np.asarray(moved.data, float) - lo) / (0.25 * (hi - lo)), 0, 1)
    np.testing.assert_allclose(after[2], 255 * level[..., None] * colour[None, None], atol=0.51)
    assert after[2].sum() > before[2].sum()  # a lower top: brighter
    assert not moved.visible and picture.visible  # still the grid
