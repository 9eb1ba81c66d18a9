"""npe2 reader: an ROI (OME-TIFF, OME-Zarr, or TIFF with its stain sheet) as one layer per channel
(multiscale when the file holds a pyramid)."""

from __future__ import annotations

from pathlib import Path

from ._layers import CONTRAST_PERCENTILES, find_stains, grid_tiles, robust_limits, roi_layer_data

_SUFFIXES = (".ome.tiff", ".ome.tif", ".tiff", ".tif", ".ome.zarr", ".zarr")


def napari_get_reader(path):
    """Return :func:`read_roi_layers` when plexwash can read ``path``, else None.

    A plain TIFF is read only when a ``stains.csv`` lies beside it (or one folder up),
    because its pages carry no channel names.
    """
    if isinstance(path, (list, tuple)):
        if len(path) != 1:
            return None
        path = path[0]
    path = Path(path)
    name = path.name.lower()
    if not name.endswith(_SUFFIXES) or not path.exists():
        return None
    if name.endswith((".zarr",)):
        return read_roi_layers if path.is_dir() else None
    if not name.endswith((".ome.tiff", ".ome.tif")) and find_stains(path) is None:
        import tifffile

        try:
            with tifffile.TiffFile(path) as tif:
                if not tif.is_ome:
                    return None
        except Exception:
            return None
    return read_roi_layers


def read_with_stains(path):
    """Read an ROI with the ``stains.csv`` found beside it or one folder up.

    The stain sheet names the channels of a plain TIFF and gives readable labels to OME files
    whose channels it lists; a stain sheet that does not match an OME file is ignored (the
    file's own names are used).
    """
    from plexwash.qc import read_roi
    from plexwash.qc.errors import InputError

    path = Path(path)
    stains = find_stains(path)
    try:
        return read_roi(path, stains=stains)
    except InputError:
        if stains is None or not path.name.lower().endswith((".ome.tiff", ".ome.tif", ".zarr")):
            raise
        return read_roi(path)


def read_roi_layers(path) -> list[tuple]:
    """Read one ROI (or several) into image layer data, one layer per channel."""
    if isinstance(path, (list, tuple)):
        return [layer for p in path for layer in read_roi_layers(p)]
    return multiscale_layers(read_with_stains(path))


def multiscale_layers(roi) -> list[tuple]:
    """One layer per channel; a file with a pyramid gives multiscale layers (level 0 first)."""
    from plexwash.qc.io import read_levels

    layers = roi_layer_data(roi)
    levels = read_levels(roi.path)
    if len(levels) < 2 or tuple(levels[0].shape) != tuple(roi.shape):
        return layers
    return [([level[i] for level in levels], {**kwargs, "multiscale": True}, kind)
            for i, (_, kwargs, kind) in enumerate(layers)]


def load_roi(path, *, low: float = CONTRAST_PERCENTILES[0], high: float = CONTRAST_PERCENTILES[1]):
    """Read an ROI with its stain sheet and make its channel layers with robust contrast."""
    roi = read_with_stains(path)
    layers = roi_layer_data(roi, visible=1)
    for data, kwargs, _ in layers:
        kwargs["contrast_limits"] = list(robust_limits(data, low=low, high=high))
    return roi, layers


def load_roi_with_tiles(path, **percentiles):
    """:func:`load_roi`, plus the block-averaged tiles of the grid view (see ``grid_tiles``)."""
    roi, layers = load_roi(path, **percentiles)
    return roi, layers, grid_tiles(roi)
