"""The report's spillover section: the matrix as a matplotlib figure (PNG) with its values,
and the matrices batches had of their own.

The per-ROI heatmaps (SBR, removed fractions) are drawn without matplotlib, see
:mod:`.heatmaps`.

Figures are drawn on the Agg canvas without pyplot (no global state, no display), so
reports can be written from worker threads and headless machines.
"""

from __future__ import annotations

import io
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from .style import escape, img_tag


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


def section_spillover(matrix, error, recipe, per_batch: str = "") -> str:
    """The spillover section: the run's matrix (heatmap and non-zero pairs), then
    ``per_batch`` (the table of :func:`batch_matrices`)."""
    out = ['<section id="spillover"><h2>Spillover matrix used</h2>']
    if matrix is None:
        if error:
            out.append(f"<p class=\"failed\">{escape(error)}</p>")
        elif recipe is not None and not recipe.compensation.enabled:
            out.append("<p>Compensation is disabled in the recipe.</p>")
        elif per_batch:
            out.append("<p>No matrix for the whole run: only the batches below were compensated.</p>")
        else:
            out.append("<p>No spillover matrix was given: compensation did not run.</p>")
        out.append(per_batch + "</section>")
        return "\n".join(out)
    values = np.asarray(matrix.values, float)
    off = values.copy()
    np.fill_diagonal(off, 0.0)
    out.append('<p class="note">Entry (row i, column j): fraction of channel i\'s signal measured '
               "in channel j, in percent; the diagonal (1) is left blank. "
               f"Largest off-diagonal entry {100 * off.max():.3g} %; "
               f"{int(np.count_nonzero(off > 0))} non-zero pairs.</p>")
    out.append(img_tag(plot_spillover(off, list(matrix.channels)), "spillover matrix heatmap"))
    pairs = sorted(((values[i, j], matrix.channels[i], matrix.channels[j])
                    for i in range(len(values)) for j in range(len(values))
                    if i != j and values[i, j] > 0), reverse=True)
    if pairs:
        out.append("<details><summary>Non-zero pairs</summary><table><tr><th>from</th><th>into</th>"
                   "<th>%</th></tr>")
        out += [f"<tr><td>{escape(a)}</td><td>{escape(b)}</td><td class=\"num\">{100 * v:.3g}</td></tr>"
                for v, a, b in pairs]
        out.append("</table></details>")
    out.append(per_batch + "</section>")
    return "\n".join(out)


def batch_matrices(out_dir: Path, recipe, latest: Mapping, samples: Mapping) -> str:
    """A table of the batches compensated with a matrix of their own (the run's recipe copy
    names each in ``[compensation.batches]``): its file, ROIs, largest entry and SHA-256."""
    if recipe is None or not recipe.batch_spillover:
        return ""
    from ..io import sha256_path
    from ..spillover import read_spillover

    counts: dict[str, int] = {}
    for name in latest:
        batch = (samples.get(name) or {}).get("batch")
        counts[batch] = counts.get(batch, 0) + 1
    lines = []
    for batch, path in sorted(recipe.batch_spillover_paths().items()):
        try:
            values = np.asarray(read_spillover(path).values, float)
            largest = f"{100 * float((values - np.diag(np.diag(values))).max()):.3g}"
            digest = sha256_path(path)[:12]
        except Exception as exc:  # the report still shows what it can
            largest, digest = f"not readable ({escape(exc)})", "&ndash;"
        lines.append(f"<tr><td>{escape(batch)}</td><td>{escape(path.name)}</td>"
                     f"<td class=\"num\">{counts.get(batch, 0)}</td><td class=\"num\">{largest}</td>"
                     f"<td class=\"hash\">{digest}</td></tr>")
    return ("<h3>Matrices per batch</h3><p class=\"note\">These batches were compensated with a "
            "matrix of their own (a copy in the run folder; the ledger records each ROI's, and the "
            "<code>spillover</code> column of quality.csv names it); other batches used the run's "
            "matrix, if any.</p><table><tr><th>batch</th><th>matrix</th><th>ROIs</th><th>largest entry %</th>"
            "<th>sha256</th></tr>" + "".join(lines) + "</table>")
