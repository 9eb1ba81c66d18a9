"""The tissue mask of the current ROI as a toggleable outline layer.

The mask is the engine's (:func:`plexwash.qc.background.tissue_mask`, the one the
background model of every step uses), computed in a worker over the channels the stain sheet
marks ``wash``; the GUI thread only swaps the result into one kept Labels layer.
"""

from __future__ import annotations

import numpy as np

from ._layers import keep_for_good

#: Name of the mask layer (not a studio channel layer: it carries no channel metadata).
MASK_LAYER = "plexwash tissue"
#: Outline colour of the tissue (the studio's accent).
MASK_COLOUR = "#5fd3a6"
#: Outline thickness in pixels.
MASK_CONTOUR = 2


def roi_tissue(roi) -> np.ndarray:
    """Where the tissue lies in an ROI: ``(Y, X)`` uint8, 1 on tissue, 0 on glass.

    Runs in a worker (reads every used channel).
    """
    from plexwash.qc.background import tissue_mask

    used = np.asarray(roi.use, bool) if any(roi.use) else None
    return tissue_mask(np.asarray(roi.data), used=used).astype(np.uint8)


def tissue_share(mask: np.ndarray) -> float:
    """Fraction of the ROI covered by tissue.

    Examples
    --------
    >>> tissue_share(np.array([[1, 0], [1, 1]], np.uint8))
    0.75
    """
    return float(np.count_nonzero(mask)) / mask.size if mask.size else 0.0


def outline_tissue(viewer, mask: np.ndarray, *, scale=None) -> object:
    """Put the mask on the viewer as an outline (one kept layer; later masks swap its data)."""
    if MASK_LAYER in viewer.layers:
        layer = viewer.layers[MASK_LAYER]
        if scale is not None and tuple(layer.scale) != tuple(scale):
            layer.scale = scale
        layer.data = mask
        if not layer.visible:
            layer.visible = True
        return layer
    from napari.utils.colormaps import DirectLabelColormap

    colormap = DirectLabelColormap(color_dict={0: "transparent", 1: MASK_COLOUR, None: "transparent"})
    active = viewer.layers.selection.active
    kwargs = {"scale": tuple(scale)} if scale is not None else {}
    layer = viewer.add_labels(mask, name=MASK_LAYER, opacity=0.9, colormap=colormap, **kwargs)
    layer.contour = MASK_CONTOUR
    layer.editable = False
    viewer.layers.selection.active = active  # the mask never takes the layer controls
    keep_for_good(viewer)
    return layer


def hide_tissue(viewer) -> None:
    if MASK_LAYER in viewer.layers and viewer.layers[MASK_LAYER].visible:
        viewer.layers[MASK_LAYER].visible = False
