"""Contact sheets: one small thumbnail per ROI and channel, grouped by batch or slide.

Each channel becomes one greyscale PNG holding every ROI's tile (a sprite); the page
shows each tile as a small element whose background is its part of the sprite, so 500
ROIs x 40 channels stay one light page. Tiles come from the washed stack's smallest
pyramid level that is still large enough (the raw ROI when the run wrote no stacks), and
share one contrast per channel across the cohort, so a batch that is brighter looks
brighter.
"""

from __future__ import annotations

import base64
import math
import os
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from .style import escape
from .thumbnails import CONTRAST_PERCENTILES, downsample, png_grey, to_grey

#: Pixels of all the tiles of a report together (about a byte each in the PNG, before
#: base64): the tile side shrinks with the cohort so the page stays light.
TILE_BUDGET = 6_000_000
#: Smallest and largest tile side, pixels.
TILE_RANGE = (16, 64)
#: Levels up to this size are read in one go (no dask scheduling per ROI).
SMALL_BYTES = 64 * 2**20
#: Tiles per row of a channel's sprite image.
SPRITE_COLUMNS = 32


def tile_size(n_rois: int, n_channels: int) -> int:
    """Tile side for a cohort: as large as the budget allows, within :data:`TILE_RANGE`.

    Examples
    --------
    >>> tile_size(4, 5), tile_size(500, 40), tile_size(5000, 50)
    (64, 17, 16)
    """
    side = math.isqrt(max(1, TILE_BUDGET // max(1, n_rois * n_channels)))
    return int(min(TILE_RANGE[1], max(TILE_RANGE[0], side)))


def roi_tiles(path: Path, size: int, *, own_output: bool) -> np.ndarray:
    """A (C, h, w) block-mean thumbnail of an ROI, longest side ``size``, float64.

    ``own_output``: a washed stack plexwash wrote (CYX, possibly pyramidal): its smallest
    level that is at least ``size`` pixels is read, not the full resolution.
    """
    from ..io import read_levels, read_roi

    data = None
    if own_output and path.name.lower().endswith((".tif", ".tiff")):
        data = _tiff_level(path, size)
    elif own_output:
        levels = [lv for lv in read_levels(path) if getattr(lv, "ndim", 0) == 3]
        fitting = [lv for lv in levels if max(lv.shape[-2:]) >= size]
        data = fitting[-1] if fitting else (levels[0] if levels else None)
    if data is None:
        data = read_roi(path).data
    if getattr(data, "nbytes", 0) <= SMALL_BYTES and hasattr(data, "compute"):
        data = np.asarray(data.compute(scheduler="synchronous"))  # no task-graph cost per ROI
    return downsample(data, size)


def _tiff_level(path: Path, size: int):
    """The smallest pyramid level of a washed OME-TIFF (CYX) at least ``size`` px, read directly.

    Read with tifffile alone (no task graph): for hundreds of small ROIs the per-file cost
    matters more than anything else. None when the file is not laid out that way.
    """
    import tifffile

    with tifffile.TiffFile(path) as tif:
        levels = [lv for lv in tif.series[0].levels if len(lv.shape) == 3]
        if not levels:
            return None
        fitting = [lv for lv in levels if max(lv.shape[-2:]) >= size]
        level = fitting[-1] if fitting else levels[0]
        if level.size * level.dtype.itemsize > SMALL_BYTES:
            return None
        return level.asarray()


def group_of(rid: str, sample: Mapping | None) -> str:
    """The group an ROI is shown in: its batch, else its slide (first folder), else none.

    Examples
    --------
    >>> group_of("slide03/r07", None), group_of("slide03/r07", {"batch": "B2"}), group_of("r1", None)
    ('slide03', 'B2', '')
    """
    if sample and sample.get("batch"):
        return str(sample["batch"])
    return rid.split("/", 1)[0] if "/" in rid else ""


def grouped(names: Sequence[str], samples: Mapping[str, Mapping]) -> list[tuple[str, list[str]]]:
    """ROI ids in their groups (groups and ids sorted)."""
    groups: dict[str, list[str]] = {}
    for name in names:
        groups.setdefault(group_of(name, samples.get(name)), []).append(name)
    return [(g, sorted(groups[g])) for g in sorted(groups)]


def contact_sheets(thumbs: Mapping[str, tuple[Sequence[str], np.ndarray]],
                   groups: list[tuple[str, list[str]]], size: int,
                   marks: Mapping[tuple[str, str], str]) -> str:
    """HTML of the contact sheets: one ``<details>`` per channel, tiles grouped.

    Parameters
    ----------
    thumbs : mapping
        ROI id -> (channel names, (C, h, w) thumbnail); ROIs without one are shown empty.
    groups : list
        (group name, ROI ids) in display order.
    size : int
        Tile side.
    marks : mapping
        (ROI id, channel) -> CSS class of a flagged tile (``o`` outlier, ``e`` empty).
    """
    order = [name for _, names in groups for name in names]
    position = {name: k for k, name in enumerate(order)}
    channels: list[str] = []
    for name in order:
        for channel in (thumbs.get(name) or ((), None))[0]:
            if channel not in channels:
                channels.append(channel)
    if not channels:
        return "<p>No thumbnails could be read.</p>"
    cols = min(SPRITE_COLUMNS, max(1, len(order)))
    rows = math.ceil(len(order) / cols)
    style, parts = [f".sheet i{{width:{size}px;height:{size}px}}"], []
    for c, channel in enumerate(channels):
        sprite, lo_hi = _sprite(channel, order, thumbs, size, cols, rows)
        data = base64.b64encode(png_grey(sprite)).decode("ascii")
        style.append(f".s{c}{{background-image:url(data:image/png;base64,{data})}}")
        body = []
        for group, names in groups:
            tiles = []
            for name in names:
                k = position[name]
                x, y = (k % cols) * size, (k // cols) * size
                mark = marks.get((name, channel), "")
                tiles.append(f'<i class="s{c}{" " + mark if mark else ""}" style="background-position:'
                             f'-{x}px -{y}px" title="{escape(name)}" data-roi="{escape(name)}"></i>')
            title = f"<h4>{escape(group)} <span>· {len(names)} ROI(s)</span></h4>" if group else ""
            body.append(f'<div class="group">{title}<div class="sheet">{"".join(tiles)}</div></div>')
        note = f"black {lo_hi[0]:.3g}, white {lo_hi[1]:.3g}"
        parts.append(f'<details class="channel"{" open" if c == 0 else ""}><summary>{escape(channel)} '
                     f'<span class="note">({note})</span></summary>{"".join(body)}</details>')
    return f"<style>{''.join(style)}</style>" + "\n".join(parts)


def _sprite(channel, order, thumbs, size, cols, rows):
    """One channel's tiles in a grid, one contrast for all (percentiles of the pooled tiles)."""
    planes = []
    for name in order:
        names, image = thumbs.get(name) or ((), None)
        planes.append(image[list(names).index(channel)] if image is not None and channel in names
                      else None)
    pooled = [p.ravel() for p in planes if p is not None]
    if pooled:
        lo, hi = (float(v) for v in np.percentile(np.concatenate(pooled), CONTRAST_PERCENTILES))
    else:
        lo, hi = 0.0, 1.0
    if hi <= lo:
        hi = lo + 1.0
    values = np.full((rows * size, cols * size), lo)  # black where there is no tile
    for k, plane in enumerate(planes):
        if plane is None:
            continue
        plane = plane[:size, :size]
        y, x = (k // cols) * size, (k % cols) * size
        values[y:y + plane.shape[0], x:x + plane.shape[1]] = plane
    return to_grey(values, lo, hi), (lo, hi)  # one pass for the whole sprite



def section_sheets(ctx, done, rows) -> str:
    """The contact sheet section of the report (``ctx``: the gathered run folder)."""
    out = ['<section id="sheets"><h2>Contact sheets</h2>']
    if not done:
        out.append("<p>No washed ROI.</p></section>")
        return "\n".join(out)
    latest = ctx["latest"]
    n_channels = max(len(latest[n].get("channels") or []) for n in done) or 1
    size = tile_size(len(done), n_channels)
    thumbs, missing = {}, []

    def tiles(name):
        rec = latest[name]
        own = bool(rec.get("output"))
        path = ctx["out_dir"] / rec["output"] if own else Path(rec.get("input") or "")
        try:
            return rec.get("channels") or [], roi_tiles(path, size, own_output=own)
        except Exception:  # a moved or damaged file: its tiles stay black, the list says so
            return None

    # Decoding small pyramid levels releases the GIL: washed stacks are read on a few threads
    # (raw ROIs, read whole when the run wrote no stacks, one at a time to bound memory).
    own = all(latest[name].get("output") for name in done)
    threads = max(1, min(4, os.cpu_count() or 1)) if own else 1
    with ThreadPoolExecutor(threads) as pool:
        for name, got in zip(done, pool.map(tiles, done), strict=True):
            if got is None:
                missing.append(name)
            else:
                thumbs[name] = got
    marks = {}
    for row in rows:
        flags = set(row.get("flags") or [])
        if row.get("stage") == "washed" and flags:
            mark = "o" if flags & {"outlier", "batch-outlier"} else "e" if "empty" in flags else "f"
            marks[(row["roi"], row["channel"])] = mark
    out.append('<p class="note">One tile per ROI and channel (washed; raw where no stack was '
               f"written), {size} px, block means. One contrast per channel for the whole cohort "
               "(percentiles of all its tiles), so batches and slides compare at a glance. Tiles "
               "are grouped by batch (or slide); hover for the ROI. Outlined: "
               '<span class="chip outlier">outlier</span> red, <span class="chip empty">empty</span> '
               "purple, other flags amber. Click a channel to open it.</p>")
    if missing:
        out.append(f'<p class="note">Not shown (file unreadable): {escape(", ".join(missing))}.</p>')
    out.append(contact_sheets(thumbs, grouped(done, ctx["samples"]), size, marks))
    out.append("</section>")
    return "\n".join(out)
