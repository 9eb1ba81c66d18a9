"""Turning ROIs and step results into napari layer data (plain functions, no viewer needed).

The studio's look is its own: a palette of eight hues on black, chosen so neighbouring
channels in an overlay stay apart, and layer names of the form ``<label>`` for raw
channels and ``<label> · <stage>`` for what a step made of them.
"""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np

#: Studio palette: (name, hex) pairs, cycled over channels. Hues are spaced so that any
#: three consecutive channels mix to distinct colours under additive blending.
PALETTE = (
    ("ember", "#ff6b3d"),
    ("glacier", "#45c8ff"),
    ("moss", "#8fe04a"),
    ("orchid", "#d46bff"),
    ("amber", "#ffc53d"),
    ("lagoon", "#2fe0b8"),
    ("coral", "#ff5c8a"),
    ("periwinkle", "#7d8bff"),
)

#: Default robust contrast: percentiles of the channel's pixels (common practice).
CONTRAST_PERCENTILES = (0.5, 99.8)
#: Contrast is estimated from at most this many pixels (a regular subsample).
CONTRAST_SAMPLE = 262_144

STAGE_SEPARATOR = " · "
STAGES = ("raw", "washed", "removed", "compensated")
#: Stages of the Speckle preview: two layers, kept for the session, their data swapped.
PREVIEW_STAGES = ("washed", "removed")


def colormap_for(index: int):
    """The studio colormap of the channel at ``index`` (black to one palette hue).

    Examples
    --------
    >>> colormap_for(0).name
    'plexwash ember'
    >>> colormap_for(8).name == colormap_for(0).name
    True
    """
    name, hexcode = PALETTE[index % len(PALETTE)]
    rgb = tuple(int(hexcode[i : i + 2], 16) / 255 for i in (1, 3, 5))
    return _colormap(f"plexwash {name}", name, rgb)


def grey_colormap():
    """Black to white: single channels judged alike, whatever their hue."""
    return _colormap("plexwash grey", "grey", (0.92, 0.92, 0.92))


def removed_colormap():
    """Colormap of removed maps: black to white, so they never read as a channel hue."""
    return _colormap("plexwash removed", "removed", (1.0, 1.0, 1.0))


@functools.cache
def _colormap(name: str, display_name: str, rgb: tuple[float, float, float]):
    """One Colormap object per hue: napari registers every new colormap with every layer's
    controls, so making a fresh object per assignment costs seconds on a 40-channel ROI."""
    from napari.utils.colormaps import Colormap

    return Colormap([[0.0, 0.0, 0.0, 1.0], [*rgb, 1.0]], name=name, display_name=display_name)


def set_colormap(layer, colormap) -> None:
    """Assign a colormap only when it changes (assignments redraw the layer's controls)."""
    if layer.colormap.name != colormap.name:
        layer.colormap = colormap


def _sample(image) -> np.ndarray:
    """A regular subsample of a 2-D image (numpy or dask) with at most ``CONTRAST_SAMPLE`` pixels."""
    n_y, n_x = image.shape[-2:]
    step = max(1, int(np.ceil(np.sqrt(n_y * n_x / CONTRAST_SAMPLE))))
    sample = image[..., ::step, ::step]
    if hasattr(sample, "compute"):
        sample = sample.compute()
    return np.asarray(sample, dtype=np.float64)


def robust_limits(image, *, low: float = CONTRAST_PERCENTILES[0],
                  high: float = CONTRAST_PERCENTILES[1]) -> tuple[float, float]:
    """Contrast limits from percentiles of an image, never an empty range.

    Parameters
    ----------
    image : array (Y, X), numpy or dask
        One channel.
    low, high : float
        Percentiles (0-100) mapped to black and to full colour.

    Returns
    -------
    (float, float)
        ``lo < hi``. A constant image gives ``(v, v + 1)``.

    Examples
    --------
    >>> import numpy as np
    >>> robust_limits(np.arange(101.0).reshape(1, 101), low=10, high=90)
    (10.0, 90.0)
    >>> robust_limits(np.zeros((4, 4)))
    (0.0, 1.0)
    """
    if not 0 <= low < high <= 100:
        raise ValueError(f"percentiles must satisfy 0 <= low < high <= 100, got {low}, {high}")
    sample = _sample(image)
    lo, hi = (float(v) for v in np.percentile(sample, [low, high]))
    if hi <= lo:  # sparse counts: the high percentile can still be 0; fall back to the max
        hi = float(sample.max())
    if hi <= lo:
        hi = lo + 1.0
    return lo, hi


def layer_name(label: str, stage: str = "raw") -> str:
    """Name of a studio layer.

    Examples
    --------
    >>> layer_name("CD3")
    'CD3'
    >>> layer_name("CD3", "washed")
    'CD3 · washed'
    """
    return label if stage == "raw" else f"{label}{STAGE_SEPARATOR}{stage}"


def studio_meta(roi_path, channel: str, label: str, index: int, stage: str = "raw") -> dict:
    """What the studio records in ``layer.metadata['plexwash']``."""
    return {"roi": str(roi_path), "channel": channel, "label": label, "index": int(index),
            "stage": stage}


def channel_layer(image, *, roi_path, channel: str, label: str, index: int, stage: str = "raw",
                  pixel_size=None, visible: bool = True, limits=None) -> tuple:
    """One napari image ``LayerDataTuple`` for a channel (or a step's result on it)."""
    kwargs = {
        "name": layer_name(label, stage),
        "colormap": removed_colormap() if stage == "removed" else colormap_for(index),
        "blending": "additive",
        "contrast_limits": list(limits if limits is not None else robust_limits(image)),
        "visible": visible,
        "metadata": {"plexwash": studio_meta(roi_path, channel, label, index, stage)},
    }
    if pixel_size is not None:
        kwargs["scale"] = tuple(float(s) for s in pixel_size)
    return (image, kwargs, "image")


def roi_layer_data(roi, *, visible: int | None = 1) -> list[tuple]:
    """One image layer per channel of an ROI, named by marker name (else channel name).

    Parameters
    ----------
    roi : plexwash.qc.Roi
    visible : int or None
        How many leading channels start visible (None: all). Twenty additive channels at
        once wash out to white, so by default only the first is shown.
    """
    layers = []
    for i, (channel, label) in enumerate(zip(roi.channels, roi.labels, strict=True)):
        show = visible is None or i < visible
        layers.append(channel_layer(roi.data[i], roi_path=roi.path, channel=channel, label=label,
                                    index=i, pixel_size=roi.pixel_size, visible=show))
    return layers


def find_stains(path) -> Path | None:
    """``stains.csv`` beside an ROI, or in the folder above (a cohort folder's parent).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> root = pathlib.Path(tempfile.mkdtemp()); (root / "cohort").mkdir()
    >>> _ = (root / "stains.csv").write_text("tag,marker,wash\\n")
    >>> find_stains(root / "cohort" / "roi.ome.tiff") == root / "stains.csv"
    True
    """
    path = Path(path)
    for folder in (path.parent, path.parent.parent):
        candidate = folder / "stains.csv"
        if candidate.is_file():
            return candidate
    return None


def studio_layers(viewer, *, stage: str | None = None, roi=None) -> list:
    """Layers the studio put on a viewer, optionally only one stage or one ROI path."""
    out = []
    for layer in viewer.layers:
        meta = layer.metadata.get("plexwash") if hasattr(layer, "metadata") else None
        if not meta:
            continue
        if stage is not None and meta.get("stage") != stage:
            continue
        if roi is not None and meta.get("roi") != str(roi):
            continue
        out.append(layer)
    return out


def set_layer(viewer, layer_tuple: tuple):
    """Add a layer, or replace the data of the layer of the same name (keeps the user's view)."""
    data, kwargs, _ = layer_tuple
    name = kwargs["name"]
    if name in viewer.layers:
        layer = viewer.layers[name]
        layer.data = data
        layer.metadata = kwargs["metadata"]
        layer.contrast_limits = kwargs["contrast_limits"]
        return layer
    return viewer.add_image(data, **kwargs)


def swap_layer(layer, data, kwargs: dict) -> None:
    """Give a kept layer new pixels, contrast, name, metadata and scale (no remove / add).

    Removing and re-adding layers while the canvas draws leaves GPU objects for the garbage
    collector, which may run on any thread (a preview worker); swapping data does not.
    """
    name = kwargs["name"]
    if layer.name != name:
        layer.name = name
    layer.metadata = kwargs["metadata"]
    if "colormap" in kwargs:
        set_colormap(layer, kwargs["colormap"])
    scale = kwargs.get("scale")
    if scale is not None and tuple(layer.scale) != tuple(scale):
        layer.scale = scale
    if "translate" in kwargs and tuple(layer.translate) != tuple(kwargs["translate"]):
        layer.translate = kwargs["translate"]
    resized = tuple(layer.data.shape) != tuple(data.shape)
    layer.data = data
    if resized and not layer.visible:  # napari skips a hidden layer's refresh, extent included,
        # and the camera would later fit the old ROI's size; setting a transform renews the
        # extent (only when the size changed: each transform set costs tens of ms)
        layer.translate = tuple(layer.translate)
    limits = tuple(kwargs["contrast_limits"])
    if tuple(layer.contrast_limits) != limits:
        layer.contrast_limits = limits


def show_roi_layers(viewer, layers: list[tuple]) -> bool:
    """Put an ROI's channel layers on the viewer; returns True when the layers were kept.

    When the raw layers already on the viewer are the same channels in the same order (ROIs
    of a cohort share a stain sheet), each keeps its place and gets the new ROI's data. Otherwise
    the raw layers are replaced in one batch (one scene-graph update, one garbage collection).
    Layers of other stages (previews, compensated) are kept: their owners swap their data.
    """
    raw = studio_layers(viewer, stage="raw")
    channels = [kwargs["metadata"]["plexwash"]["channel"] for _, kwargs, _ in layers]
    if [layer.metadata["plexwash"]["channel"] for layer in raw] == channels:
        for layer, (data, kwargs, _) in zip(raw, layers, strict=True):
            swap_layer(layer, data, kwargs)
        return True
    from napari.layers import Image

    made = [Image(data, **kwargs) for data, kwargs, _ in layers]
    with viewer.layers.batched_update():
        for layer in studio_layers(viewer):
            if layer.metadata["plexwash"]["stage"] in ("raw", "compensated"):
                viewer.layers.remove(layer)
        viewer.layers.extend(made)
        for layer in studio_layers(viewer):  # previews stay on top of the raw channels
            if layer.metadata["plexwash"]["stage"] in PREVIEW_STAGES:
                viewer.layers.move(viewer.layers.index(layer), len(viewer.layers))
    import gc

    gc.collect()  # here, on the GUI thread, between draws: not later on a worker's thread
    return False


def keep_for_good(viewer) -> None:
    """Move the objects alive now out of the garbage collector's sight, when the studio owns the
    process (``launch_studio``); call after adding layers that live as long as the window.

    napari collects garbage on the GUI thread at the end of every batched layer update; each
    collection walks every tracked object, about 0.3 s once a 36-channel ROI's compensated
    layers exist. Frozen objects are skipped (later objects are still collected).
    """
    from ._state import studio_state

    if studio_state(viewer).owns_process:
        import gc

        gc.freeze()


#: Gap between tiles (grid cells, preview panels) as a fraction of the ROI's size.
TILE_GAP = 0.05
#: Name of the layer that labels and frames the tiles (not a studio layer: no metadata).
LABELS_LAYER = "plexwash labels"
#: Name of the layer that labels and frames the grid view's tiles: its own layer, so that going
#: from the grid to the preview and back never re-triangulates dozens of frames.
GRID_LABELS_LAYER = "plexwash grid labels"
#: Name of the layer that shows the grid view's tiles as one picture (not a studio layer).
GRID_LAYER = "plexwash grid"


def roi_extent(roi) -> tuple[float, float]:
    """Height and width of an ROI in world units (pixels times the pixel size)."""
    size = roi.pixel_size or (1.0, 1.0)
    return roi.shape[1] * float(size[0]), roi.shape[2] * float(size[1])


def tile_origins(n: int, extent: tuple[float, float]) -> list[tuple[float, float]]:
    """Top-left corners of ``n`` tiles of one ROI's size, in rows, near square overall.

    Examples
    --------
    >>> tile_origins(3, (10.0, 10.0))
    [(0.0, 0.0), (0.0, 10.5), (10.5, 0.0)]
    """
    import math

    height, width = extent
    columns = max(1, math.ceil(math.sqrt(n * height / width))) if n else 1
    pitch_y, pitch_x = height * (1 + TILE_GAP), width * (1 + TILE_GAP)
    return [(float((k // columns) * pitch_y), float((k % columns) * pitch_x)) for k in range(n)]


def place(layer, origin) -> None:
    """Move a layer's top-left corner (only when it moves: each move redraws)."""
    origin = tuple(float(v) for v in origin)
    if tuple(float(v) for v in layer.translate) != origin:
        layer.translate = origin


def label_size(texts, width: float) -> float:
    """Text size of tile labels in world units (the text zooms with the image): the longest
    label fills at most about nine tenths of a tile's width, and never more than 12 %.

    Examples
    --------
    >>> label_size(["CD3"], 300.0), label_size(["a-very-long-marker-name"], 300.0)
    (36.0, 12.391304347826088)
    """
    longest = max([len(t) for t in texts] + [1])
    return float(min(0.12 * width, 0.95 * width / longest))


def show_labels(viewer, tiles: list[tuple[tuple[float, float], str]], extent, *, name: str = LABELS_LAYER,
                visible: bool = True) -> None:
    """Frame and label tiles: one kept Shapes layer ``name`` (rectangles with text), data swapped;
    ``visible=False`` fills a hidden layer ahead of its first showing."""
    height, width = extent
    boxes = [np.array([[y, x], [y + height, x + width]]) for (y, x), _ in tiles]
    texts = [text for _, text in tiles]
    size = label_size(texts, width)
    edge = max(height, width) * 0.004
    if name in viewer.layers:
        layer = viewer.layers[name]
        if visible and not layer.visible:  # first: a hidden layer's extent is not renewed with its data
            layer.visible = True
            if layer.metadata.get("filled_hidden"):  # filled while hidden: its extent now
                layer.refresh()
                layer.metadata = {"tiles": layer.metadata["tiles"]}
        at = viewer.layers.index(name)
        if visible and at != len(viewer.layers) - 1:  # layers added since (previews, outlines): on top
            viewer.layers.move(at, len(viewer.layers))
        frames = (tuple(tuple(float(v) for v in box.ravel()) for box in boxes), edge)
        drawn = (frames, tuple(texts), size)
        before = layer.metadata.get("tiles")
        if before == drawn:
            return  # the same frames and names (back to a view): napari re-triangulates every shape set
        layer.metadata = {"tiles": drawn, "filled_hidden": not visible}
        if before is not None and before[0] == frames:  # only the names changed (the preview of
            layer.features = {"label": texts}  # another channel): no new shapes to triangulate
            if layer.text.size != size:
                layer.text.size = size
            return
        layer.data = boxes
        layer.shape_type = ["rectangle"] * len(boxes)
        layer.features = {"label": texts}
        layer.edge_width = edge
        if layer.text.size != size:
            layer.text.size = size
    else:
        _add_labels(viewer, boxes, texts, size, edge, extent, visible, name)


def _add_labels(viewer, boxes, texts, size, edge, extent, visible: bool = True, name: str = LABELS_LAYER) -> None:
    height, width = extent
    active = viewer.layers.selection.active
    viewer.add_shapes(boxes, shape_type="rectangle", name=name, features={"label": texts},
                      edge_color="#59616b", face_color="transparent", edge_width=edge, visible=visible,
                      text={"string": "{label}", "anchor": "upper_left", "color": "#e6e9ed", "size": size,
                            "scaling": True, "translation": [0.02 * height, 0.02 * width]},
                      blending="translucent_no_depth")
    viewer.layers.selection.active = active  # the labels never take the layer controls
    keep_for_good(viewer)


def prepare_tile_layers(viewer, extent) -> None:
    """Make the grid picture and the tile labels layers now, hidden (with the first ROI's layers):
    making them on the first Grid or Preview click froze the window about half a second."""
    if GRID_LAYER not in viewer.layers:
        show_mosaic(viewer, np.zeros((2, 2, 3), np.uint8), (1.0, 1.0), (0.0, 0.0), visible=False)
    height, width = extent
    for name in (LABELS_LAYER, GRID_LABELS_LAYER):
        if name not in viewer.layers:
            _add_labels(viewer, [np.array([[0.0, 0.0], [height, width]])], [""], label_size([""], width),
                        max(extent) * 0.004, extent, visible=False, name=name)


#: The grid's tiles together span at most about this many pixels across (one screen): each
#: tile is the channel block-averaged by the smallest whole factor that fits.
GRID_SPAN = 1600


def tile_factor(n: int, shape: tuple[int, int], span: int = GRID_SPAN) -> int:
    """Block size that shrinks ``n`` tiles of ``shape`` (Y, X) to about one screen across.

    Examples
    --------
    >>> tile_factor(36, (1000, 1000)), tile_factor(22, (320, 320)), tile_factor(1, (300, 500))
    (4, 1, 1)
    """
    columns = len({x for _, x in tile_origins(n, (float(shape[0]), float(shape[1])))}) if n else 1
    return max(1, -(-columns * int(shape[1]) // span))


def block_mean(image, factor: int) -> np.ndarray:
    """Mean of each ``factor`` x ``factor`` block of a 2-D image (float32); edges padded by repeating
    the last row and column, so the blocks cover the whole image.

    Examples
    --------
    >>> block_mean(np.arange(16.0).reshape(4, 4), 2)
    array([[ 2.5,  4.5],
           [10.5, 12.5]], dtype=float32)
    >>> block_mean(np.ones((3, 5)), 2).shape
    (2, 3)
    """
    image = np.asarray(image, dtype=np.float32)
    if factor <= 1:
        return image
    n_y, n_x = image.shape
    pad = ((0, -n_y % factor), (0, -n_x % factor))
    if any(after for _, after in pad):
        image = np.pad(image, pad, mode="edge")
    blocks = image.reshape(image.shape[0] // factor, factor, image.shape[1] // factor, factor)
    return blocks.mean(axis=(1, 3), dtype=np.float32)


def grid_tiles(roi) -> tuple[list[np.ndarray], int]:
    """Every channel of an ROI block-averaged for the grid view, and the block size used.

    Thirty-six full-size textures make the grid freeze the window for seconds; tiles of about
    a screen's resolution in all show the same picture. Runs in the load worker.
    """
    factor = tile_factor(len(roi.channels), roi.shape[1:])
    return [block_mean(roi.data[i], factor) for i in range(len(roi.channels))], factor


def tile_offset(factor: int, pixel_size) -> tuple[float, float]:
    """Shift of a tile layer so that its blocks cover the pixels they average (pixel centres
    of a napari layer sit on its translate)."""
    size = pixel_size or (1.0, 1.0)
    return tuple(0.5 * (factor - 1) * float(s) for s in size)


def grid_mosaic(tiles, corners, factor: int, limits, colours) -> np.ndarray:
    """One RGB picture of the whole grid (uint8, black gaps): tile ``k`` at world corner
    ``corners[k]``, scaled to 0-1 by ``limits[k]`` and drawn in ``colours[k]`` (RGB, 0-1), as a
    layer with that contrast and a black-to-hue colormap would draw it.

    One texture instead of one layer per channel: showing, placing and uploading 36 layers
    froze the window for seconds. ``corners`` are in full-size pixels (world units divided
    by the pixel size); ``factor`` is the tiles' block size.

    Examples
    --------
    >>> tiles = [np.array([[0.0, 10.0]]), np.array([[5.0, 5.0]])]
    >>> grid_mosaic(tiles, [(0, 0), (0, 3)], 1, [(0, 10), (0, 10)], [(1, 0, 0), (0, 1, 0)])[..., :2]
    array([[[  0,   0],
            [255,   0],
            [  0,   0],
            [  0, 128],
            [  0, 128]]], dtype=uint8)
    """
    origins = [(int(round(y / factor)), int(round(x / factor))) for y, x in corners]
    n_y = max(oy + t.shape[0] for (oy, _), t in zip(origins, tiles, strict=True))
    n_x = max(ox + t.shape[1] for (_, ox), t in zip(origins, tiles, strict=True))
    out = np.zeros((n_y, n_x, 3), np.uint8)
    for (oy, ox), tile, (lo, hi), colour in zip(origins, tiles, limits, colours, strict=True):
        level = (np.asarray(tile, np.float32) - np.float32(lo)) * np.float32(1.0 / max(hi - lo, 1e-12))
        np.clip(level, 0.0, 1.0, out=level)
        window = out[oy:oy + tile.shape[0], ox:ox + tile.shape[1]]
        for c in range(3):
            window[..., c] = np.rint(level * np.float32(255.0 * colour[c]))
    return out


def show_mosaic(viewer, rgb: np.ndarray, scale, translate, visible: bool = True) -> None:
    """Show the grid's RGB picture in one kept layer (made once, data swapped; not a studio layer)."""
    scale = tuple(float(v) for v in scale)
    translate = tuple(float(v) for v in translate)
    if GRID_LAYER in viewer.layers:
        layer = viewer.layers[GRID_LAYER]
        if not layer.visible:  # first: a hidden layer's extent is not renewed with its data
            layer.visible = True
        if tuple(layer.scale) != scale:
            layer.scale = scale
        if tuple(layer.translate) != translate:
            layer.translate = translate
        if layer.data is not rgb:
            layer.data = rgb
        return
    active = viewer.layers.selection.active
    viewer.add_image(rgb, rgb=True, name=GRID_LAYER, scale=scale, translate=translate, contrast_limits=(0, 255),
                     blending="translucent_no_depth", visible=visible)
    for name in (LABELS_LAYER, GRID_LABELS_LAYER):
        if name in viewer.layers:  # frames and names above the picture
            viewer.layers.move(viewer.layers.index(name), len(viewer.layers))
    viewer.layers.selection.active = active  # the picture never takes the layer controls
    keep_for_good(viewer)


def hide_mosaic(viewer) -> None:
    if GRID_LAYER in viewer.layers and viewer.layers[GRID_LAYER].visible:
        viewer.layers[GRID_LAYER].visible = False


def hide_labels(viewer, *, keep: str | None = None) -> None:
    """Hide the tile labels layers (all but ``keep``)."""
    for name in (LABELS_LAYER, GRID_LABELS_LAYER):
        if name != keep and name in viewer.layers and viewer.layers[name].visible:
            viewer.layers[name].visible = False


def grid_of(viewer):
    """The viewer's grid settings (``viewer.canvas.grid`` since napari 0.9, ``viewer.grid`` before)."""
    canvas = getattr(viewer, "canvas", None)
    grid = getattr(canvas, "grid", None)
    return grid if grid is not None else viewer.grid


def fit_visible(viewer) -> None:
    """Fit the camera to the visible layers (hidden side-by-side previews do not count)."""
    shown = [layer for layer in viewer.layers if layer.visible and layer.name not in (LABELS_LAYER, GRID_LABELS_LAYER)]
    try:
        viewer.reset_view(layers=shown or None)
    except TypeError:  # napari before 0.9 fits every layer
        viewer.reset_view()


def overlay_hues(ticked: list[str], marker_index: dict[str, int]) -> dict[str, int]:
    """Palette position of each ticked channel: its marker's own hue, the next free one on a clash.

    A marker keeps its colour from one overlay to the next unless another ticked marker
    already has it.

    Examples
    --------
    >>> overlay_hues(["A", "I"], {"A": 0, "B": 1, "I": 8})  # 8 wraps onto 0: the next free hue
    {'A': 0, 'I': 1}
    >>> overlay_hues(["B", "I"], {"A": 0, "B": 1, "I": 8})
    {'B': 1, 'I': 0}
    """
    taken: set[int] = set()
    out = {}
    for channel in ticked:
        hue = marker_index.get(channel, 0) % len(PALETTE)
        for step in range(len(PALETTE)):
            candidate = (hue + step) % len(PALETTE)
            if candidate not in taken:
                hue = candidate
                break
        taken.add(hue)
        out[channel] = hue
    return out
