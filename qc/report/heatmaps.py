"""Heatmaps of the report drawn straight from numpy: one PNG per panel, labels in HTML.

A panel's grid (rows x columns of values) goes through a colour table (the matplotlib
colour map's 256 entries, kept in :mod:`.colour_maps`, so colours match ``imshow`` with
the same limits), each cell becomes a block of pixels, and the picture is encoded as an
RGB PNG by :func:`~.thumbnails.png_rgb`. Row and column labels, panel titles and the colour scale
(a CSS gradient through the same table) are HTML, so no text is rasterised and a page of
100 ROIs costs milliseconds instead of a matplotlib layout of thousands of tick labels.
"""

from __future__ import annotations

import base64
import functools
from collections.abc import Sequence

import numpy as np

from .colour_maps import TABLES
from .style import escape
from .thumbnails import png_rgb

#: Colour of a cell with no value (not measured).
MISSING_RGB = (0xCF, 0xD3, 0xD9)
#: Height of a row of cells, pixels (labels are a little smaller).
ROW_PX = 12
#: Widest and narrowest column of cells, pixels, and the width the columns of a panel aim at.
COLUMN_PX = (8, 18, 720)
#: Ticks on a colour scale.
SCALE_TICKS = 5
#: Square matrices up to this many rows are drawn as a table with each value in its cell.
VALUE_CELLS_MAX = 30


@functools.lru_cache(maxsize=8)
def colour_table(name: str) -> np.ndarray:
    """The 256 colours of a matplotlib colour map as a (256, 3) uint8 table (the maps of
    :data:`~.colour_maps.TABLES` from there, others from matplotlib).

    Examples
    --------
    >>> colour_table("cividis").shape
    (256, 3)
    """
    if name in TABLES:  # the report's own maps: no matplotlib import (a few tenths of a second)
        return np.frombuffer(bytes.fromhex(TABLES[name]), np.uint8).reshape(256, 3).copy()
    import matplotlib as mpl

    rgba = mpl.colormaps[name](np.arange(256))
    return np.round(255.0 * rgba[:, :3]).astype(np.uint8)


def colour_cells(grid, vmin: float, vmax: float, cmap: str) -> np.ndarray:
    """Each cell's colour, (rows, cols, 3) uint8, as ``imshow`` would pick it.

    Values are scaled to 0..1 between ``vmin`` and ``vmax`` and looked up as matplotlib
    does (``floor(256 x)``, values beyond the limits take the end colours); NaN and
    infinite cells are :data:`MISSING_RGB`.
    """
    grid = np.asarray(grid, dtype=np.float64)
    span = vmax - vmin if vmax > vmin else 1.0
    finite = np.isfinite(grid)
    scaled = np.where(finite, (grid - vmin) / span, 0.0)
    index = np.clip(np.floor(scaled * 256.0), 0, 255).astype(np.intp)
    rgb = colour_table(cmap)[index]
    rgb[~finite] = MISSING_RGB
    return rgb


def column_px(n_columns: int) -> int:
    """Width of a column of cells for a panel of ``n_columns`` columns.

    Examples
    --------
    >>> column_px(12), column_px(40), column_px(200)
    (18, 18, 8)
    """
    low, high, aim = COLUMN_PX
    return int(min(high, max(low, aim // max(1, n_columns))))


def panel_png(grid, vmin: float, vmax: float, cmap: str, width: int, height: int = ROW_PX) -> bytes:
    """A panel as an RGB PNG, each cell ``width`` x ``height`` pixels."""
    cells = colour_cells(grid, vmin, vmax, cmap)
    return png_rgb(np.repeat(np.repeat(cells, height, axis=0), width, axis=1))


def _ticks(vmin: float, vmax: float) -> list[float]:
    return [vmin + (vmax - vmin) * k / (SCALE_TICKS - 1) for k in range(SCALE_TICKS)]


def scale_html(vmin: float, vmax: float, cmap: str, label: str) -> str:
    """A horizontal colour scale: a CSS gradient through the colour table, with ticks."""
    table = colour_table(cmap)
    stops = ", ".join(f"#{r:02x}{g:02x}{b:02x}" for r, g, b in table[np.linspace(0, 255, 17).astype(int)])
    ticks = "".join(f"<span>{value:.3g}</span>" for value in _ticks(vmin, vmax))
    return (f'<div class="hm-scale"><i style="background:linear-gradient(to right, {stops})"></i>'
            f'<div class="hm-ticks">{ticks}</div><div class="hm-label">{escape(label)}</div></div>')


def heatmap_html(panels: Sequence[tuple[str, np.ndarray, Sequence[str]]], rows: Sequence[str], *,
                 vmin: float, vmax: float, cmap: str, label: str, alt: str) -> str:
    """A figure of side-by-side heatmap panels sharing the rows and one colour scale.

    Parameters
    ----------
    panels : sequence of (title, grid, column names)
        Each grid is (len(rows), len(columns)); a panel without columns says "not measured".
    rows : sequence of str
        Row labels (ROI ids), top to bottom.
    vmin, vmax : float
        The colour scale's limits, shared by every panel (and by the pages of a cohort).
    cmap : str
        A matplotlib colour map name.
    label : str
        What the colour shows (under the scale).
    alt : str
        The figure's accessible name (``aria-label``); each panel's image is
        ``"<alt>: <panel title>"``.
    """
    if vmax <= vmin:
        vmax = vmin + 1.0
    width = column_px(max((len(cols) for _, _, cols in panels), default=1))
    row_labels = "<br>".join(escape(r) for r in rows)
    parts = [f'<figure class="heat" role="group" aria-label="{escape(alt)}" '
             f'style="--cw:{width}px;--ch:{ROW_PX}px">',
             f'<div class="hm"><div class="hm-rows">{row_labels}</div>']
    for title, grid, cols in panels:
        parts.append(f'<div class="hm-panel"><div class="hm-title">{escape(title)}</div>')
        if not len(cols) or not len(rows):
            parts.append('<div class="hm-none">not measured</div></div>')
            continue
        data = base64.b64encode(panel_png(grid, vmin, vmax, cmap, width)).decode("ascii")
        name = f"{alt}: {title}"
        parts.append(f'<img class="hm-img" src="data:image/png;base64,{data}" width="{width * len(cols)}" '
                     f'height="{ROW_PX * len(rows)}" alt="{escape(name)}">')
        parts.append('<div class="hm-cols">' + "".join(f"<span>{escape(c)}</span>" for c in cols)
                     + "</div></div>")
    parts.append("</div>")
    parts.append(scale_html(vmin, vmax, cmap, label))
    parts.append("</figure>")
    return "".join(parts)


def matrix_html(grid, names: Sequence[str], *, vmin: float, vmax: float, cmap: str, title: str,
                label: str, alt: str) -> str:
    """A square matrix (rows and columns both ``names``) as a heatmap with one colour scale.

    Up to :data:`VALUE_CELLS_MAX` names it is an HTML table: each cell coloured as
    :func:`colour_cells` picks and holding its value (one decimal, from 0.1 up; white ink
    from 60 % of ``vmax`` up, on the darker colours). Larger matrices are one
    :func:`heatmap_html` panel, too small for written values.
    """
    grid = np.asarray(grid, dtype=np.float64)
    if vmax <= vmin:
        vmax = vmin + 1.0
    if not 0 < len(names) <= VALUE_CELLS_MAX:
        return heatmap_html([(title, grid, names)], names, vmin=vmin, vmax=vmax, cmap=cmap,
                            label=label, alt=alt)
    cells = colour_cells(grid, vmin, vmax, cmap)
    head = "".join(f"<th><span>{escape(n)}</span></th>" for n in names)
    lines = []
    for i, name in enumerate(names):
        tds = []
        for j, value in enumerate(grid[i]):
            r, g, b = (int(v) for v in cells[i, j])
            shown = bool(np.isfinite(value) and value >= 0.1)
            ink = ";color:#fff" if shown and value >= 0.6 * vmax else ""
            tds.append(f'<td style="background:#{r:02x}{g:02x}{b:02x}{ink}">'
                       f'{f"{value:.1f}" if shown else ""}</td>')
        lines.append(f"<tr><th>{escape(name)}</th>{''.join(tds)}</tr>")
    return (f'<figure class="heat" role="group" aria-label="{escape(alt)}">'
            f'<table class="matrix"><caption>{escape(title)}</caption>'
            f"<thead><tr><th></th>{head}</tr></thead><tbody>{''.join(lines)}</tbody></table>"
            f"{scale_html(vmin, vmax, cmap, label)}</figure>")
