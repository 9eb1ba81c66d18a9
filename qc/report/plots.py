"""Matplotlib figures of the report, as PNG bytes: SBR, removed fractions, spillover.

Figures are drawn on the Agg canvas without pyplot (no global state, no display), so
reports can be written from worker threads and headless machines.
"""

from __future__ import annotations

import io

import numpy as np

from ..steps.registry import step


def _figure(width, height):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    fig.patch.set_facecolor("white")
    return fig


def _png_of(fig) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    return buffer.getvalue()


def _grid_size(n_rows, n_cols, panels):
    width = min(24.0, max(6.0, panels * (1.6 + 0.24 * n_cols)))
    height = min(30.0, max(2.4, 1.4 + 0.22 * n_rows))
    return width, height


def _heat(ax, grid, rows, cols, *, cmap, vmin, vmax, title):
    import matplotlib as mpl

    if grid.size == 0:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "not measured", ha="center", va="center", transform=ax.transAxes)
        ax.set_title(title, fontsize=10)
        return None
    colormap = mpl.colormaps[cmap].with_extremes(bad="#cfd3d9")
    image = ax.imshow(np.ma.masked_invalid(grid), cmap=colormap, vmin=vmin, vmax=vmax,
                      aspect="auto", interpolation="nearest")
    ax.set_xticks(range(len(cols)))
    ax.set_xticklabels(cols, rotation=90, fontsize=7)
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels(rows, fontsize=7)
    ax.set_title(title, fontsize=10)
    return image


def plot_sbr(raw, washed, rois, channels, channels_w, *, limits=None) -> bytes:
    """Heatmaps of log10 SBR per ROI (rows) and channel (columns), raw and washed, one scale.

    ``limits``: (low, high) of log10 SBR, so that several pages of one cohort share a scale;
    by default the range of these grids.
    """
    logs = [np.log10(g) for g in (raw, washed)]
    finite = np.concatenate([g[np.isfinite(g)] for g in logs]) if raw.size else np.array([])
    vmin, vmax = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    if limits is not None:
        vmin, vmax = limits
    if vmax <= vmin:
        vmax = vmin + 1.0
    fig = _figure(*_grid_size(len(rois), max(len(channels), 1), 2))
    axes = fig.subplots(1, 2, sharey=True)
    image = None
    for ax, grid, cols, title in zip(axes, logs, (channels, channels_w), ("raw", "washed"), strict=True):
        image = _heat(ax, grid, rois, cols, cmap="cividis", vmin=vmin, vmax=vmax, title=title) or image
    if image is not None:
        fig.colorbar(image, ax=list(axes), shrink=0.9, label="log10 SBR")
    return _png_of(fig)


def plot_removed(grids, rois, *, top=None) -> bytes:
    """One heatmap per step of the % of signal it removed: ``grids`` holds (step, grid, channels).

    ``top``: the fraction shown as the top of the scale (shared by pages of one cohort).
    """
    n_cols = max(max((len(c) for _, _, c in grids), default=1), 1)
    fig = _figure(*_grid_size(len(rois), n_cols, len(grids)))
    axes = np.atleast_1d(fig.subplots(1, len(grids), sharey=True))
    if top is None:
        top = max([float(np.nanmax(g)) for _, g, _ in grids if np.isfinite(g).any()] + [1e-4])
    image = None
    for ax, (name, grid, channels) in zip(axes, grids, strict=True):
        image = _heat(ax, 100 * grid, rois, channels, cmap="PuBuGn", vmin=0.0, vmax=100 * top,
                      title=step(name).label) or image
    if image is not None:
        fig.colorbar(image, ax=list(axes), shrink=0.9, label="% of signal removed")
    return _png_of(fig)


def plot_spillover(off, channels) -> bytes:
    """Heatmap of the off-diagonal spillover entries, in percent (source rows, receiving columns)."""
    n = len(channels)
    side = min(14.0, max(4.0, 0.24 * n + 2.0))
    fig = _figure(side + 1.2, side)
    ax = fig.subplots()
    grid = 100 * off
    grid = np.where(np.eye(n, dtype=bool), np.nan, grid)
    top = float(np.nanmax(grid)) if n > 1 and np.isfinite(grid).any() else 1.0
    image = _heat(ax, grid, channels, channels, cmap="YlOrBr", vmin=0.0, vmax=max(top, 1e-6),
                  title="spillover into column channel (%)")
    if image is None:
        return _png_of(fig)
    ax.set_xlabel("receiving channel", fontsize=8)
    ax.set_ylabel("source channel", fontsize=8)
    if n <= 30:
        for i in range(n):
            for j in range(n):
                if i != j and grid[i, j] >= 0.1:
                    ax.text(j, i, f"{grid[i, j]:.1f}", ha="center", va="center", fontsize=5,
                            color="black" if grid[i, j] < 0.6 * top else "white")
    fig.colorbar(image, ax=ax, shrink=0.8, label="%")
    return _png_of(fig)
