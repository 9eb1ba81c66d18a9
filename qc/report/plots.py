"""The report's spillover section: the matrix as a heatmap with its values, and the
matrices batches had of their own.

The heatmap is drawn as the per-ROI ones are (:mod:`.heatmaps`: colours from the
colour map's table, no figure to lay out), as an HTML table holding each value for up to
30 channels.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np

from .heatmaps import matrix_html
from .style import escape


def spillover_html(off, channels) -> str:
    """Heatmap of the off-diagonal spillover entries, in percent (source rows, receiving
    columns; the diagonal grey), each value written in its cell for up to 30 channels."""
    n = len(channels)
    grid = np.where(np.eye(n, dtype=bool), np.nan, 100 * np.asarray(off, float))
    top = float(np.nanmax(grid)) if n > 1 and np.isfinite(grid).any() else 1.0
    return matrix_html(grid, list(channels), vmin=0.0, vmax=max(top, 1e-6), cmap="YlOrBr",
                       title="spillover into column channel (%); rows: source channel, "
                             "columns: receiving channel",
                       label="% of the source channel's signal", alt="spillover matrix heatmap")


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
    out.append(spillover_html(off, list(matrix.channels)))
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
