"""npe2 writer: image layers (one per channel, or a C x Y x X stack) to OME-TIFF or OME-Zarr."""

from __future__ import annotations

from datetime import UTC
from pathlib import Path

import numpy as np


def _layer_channels(data, meta: dict) -> tuple[list, list[str], list[str]]:
    """Planes, channel names (acquisition tags) and marker names of one layer's data."""
    info = (meta.get("metadata") or {}).get("plexwash") or {}
    name = info.get("channel") or meta.get("name") or "channel"
    if isinstance(data, (list, tuple)):  # a multiscale layer: level 0 is the stack
        data = data[0]
    array = np.asarray(data)
    if array.ndim == 2:
        return [array], [str(name)], [str(info.get("label") or name)]
    if array.ndim == 3:
        names = info.get("channels") or [f"{name}_{i}" for i in range(array.shape[0])]
        markers = info.get("labels") or names
        return list(array), [str(n) for n in names], [str(m) for m in markers]
    raise ValueError(f"layer {meta.get('name')!r}: expected 2-D or 3-D image data, got {array.ndim}-D")


def stack_from_layers(layer_data: list[tuple]) -> tuple[np.ndarray, list[str], tuple | None]:
    """Stack image layers into (C, Y, X) with channel names and the (y, x) pixel size.

    Channel names come from the studio's layer metadata (the acquisition name) when
    present, else from the layer name. Planes must all have the same shape.
    """
    planes, names, _markers, pixel_size, _sources = _collect(layer_data)
    return _stack(planes), names, pixel_size


def _collect(layer_data: list[tuple]):
    """Planes, tags, marker names, the (y, x) pixel size and the source files of the layers."""
    planes, names, markers, sources = [], [], [], []
    pixel_size = None
    for data, meta, *_ in layer_data:
        layer_planes, layer_names, layer_markers = _layer_channels(data, meta)
        planes.extend(layer_planes)
        names.extend(layer_names)
        markers.extend(layer_markers)
        roi = ((meta.get("metadata") or {}).get("plexwash") or {}).get("roi")
        if roi and roi not in sources:
            sources.append(roi)
        scale = meta.get("scale")
        if pixel_size is None and scale is not None and len(scale) >= 2:
            pixel_size = (float(scale[-2]), float(scale[-1]))
    if pixel_size == (1.0, 1.0):
        pixel_size = None
    return planes, names, markers, pixel_size, sources


def _stack(planes: list) -> np.ndarray:
    shapes = {p.shape for p in planes}
    if len(shapes) != 1:
        raise ValueError(f"layers differ in shape {sorted(shapes)}; write one ROI at a time")
    return np.stack(planes).astype(np.result_type(*planes), copy=False)


def write_washed_stack(path: str, layer_data: list[tuple]) -> list[str]:
    """npe2 writer: write image layers as one stack (``.ome.zarr`` folder, else OME-TIFF).

    The marker names (the stain sheet's ``marker`` column, kept in the studio's layer
    metadata) go into the file beside the tags, and a provenance record names the studio
    as the writer, the plexwash version, the date and the ROI file(s) the layers came from.
    """
    from datetime import datetime

    from plexwash.qc import __version__
    from plexwash.qc.files import check_output
    from plexwash.qc.io import OutputSettings, write_stack

    path = Path(path)
    planes, names, markers, pixel_size, sources = _collect(layer_data)
    stack = _stack(planes)
    provenance = {"software": "plexwash studio", "version": __version__,
                  "date": datetime.now(UTC).isoformat(timespec="seconds"),
                  "source": "; ".join(sources) or "napari layers"}
    fmt = "ome-zarr" if path.name.lower().endswith(".zarr") else "ome-tiff"
    if fmt == "ome-tiff" and not path.name.lower().endswith((".tif", ".tiff")):
        path = path.with_name(path.name + ".ome.tiff")
    # never over (or into) the ROI file the layers were read from, nor a file plexwash did not write
    check_output(path, sources, kind="stack")
    write_stack(path, stack, names, pixel_size=pixel_size, settings=OutputSettings(format=fmt),
                labels=markers, provenance=provenance)
    return [str(path)]
