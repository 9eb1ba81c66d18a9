"""npe2 writer: image layers (one per channel, or a C x Y x X stack) to OME-TIFF or OME-Zarr."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def _layer_channels(data, meta: dict) -> tuple[list, list[str]]:
    """Planes and channel names of one layer's data."""
    info = (meta.get("metadata") or {}).get("plexwash") or {}
    name = info.get("channel") or meta.get("name") or "channel"
    array = np.asarray(data)
    if array.ndim == 2:
        return [array], [str(name)]
    if array.ndim == 3:
        names = info.get("channels") or [f"{name}_{i}" for i in range(array.shape[0])]
        return list(array), [str(n) for n in names]
    raise ValueError(f"layer {meta.get('name')!r}: expected 2-D or 3-D image data, got {array.ndim}-D")


def stack_from_layers(layer_data: list[tuple]) -> tuple[np.ndarray, list[str], tuple | None]:
    """Stack image layers into (C, Y, X) with channel names and the (y, x) pixel size.

    Channel names come from the studio's layer metadata (the acquisition name) when
    present, else from the layer name. Planes must all have the same shape.
    """
    planes, names = [], []
    pixel_size = None
    for data, meta, *_ in layer_data:
        layer_planes, layer_names = _layer_channels(data, meta)
        planes.extend(layer_planes)
        names.extend(layer_names)
        scale = meta.get("scale")
        if pixel_size is None and scale is not None and len(scale) >= 2:
            pixel_size = (float(scale[-2]), float(scale[-1]))
    shapes = {p.shape for p in planes}
    if len(shapes) != 1:
        raise ValueError(f"layers differ in shape {sorted(shapes)}; write one ROI at a time")
    dtype = np.result_type(*planes)
    if pixel_size == (1.0, 1.0):
        pixel_size = None
    return np.stack(planes).astype(dtype, copy=False), names, pixel_size


def write_washed_stack(path: str, layer_data: list[tuple]) -> list[str]:
    """npe2 writer: write image layers as one stack (``.ome.zarr`` folder, else OME-TIFF)."""
    from plexwash.qc.io import OutputSettings, write_stack

    path = Path(path)
    stack, names, pixel_size = stack_from_layers(layer_data)
    fmt = "ome-zarr" if path.name.lower().endswith(".zarr") else "ome-tiff"
    if fmt == "ome-tiff" and not path.name.lower().endswith((".tif", ".tiff")):
        path = path.with_name(path.name + ".ome.tiff")
    write_stack(path, stack, names, pixel_size=pixel_size, settings=OutputSettings(format=fmt))
    return [str(path)]
