"""Tables of the report that scale: sortable, filterable, and the batch section.

Sorting and filtering are a few lines of inline script (:data:`SCRIPT`, no external
resource): click a column header to sort by it (numbers as numbers), type in the box
above a table to show only rows holding that text (a batch, a flag, a slide...). Without
script the tables read as plain HTML.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence

from .style import escape

#: The page's one script: sortable and filterable tables, and the load time on <body>.
SCRIPT = """(function () {
  function key(cell) {
    var v = cell.getAttribute('data-v'); if (v === null) v = cell.textContent.trim();
    var n = parseFloat(v);
    return (isNaN(n) || !/^[-+]?[0-9.]/.test(v)) ? [1, v.toLowerCase()] : [0, n];
  }
  document.querySelectorAll('table.sortable').forEach(function (table) {
    var body = table.tBodies[0], heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, i) {
      th.addEventListener('click', function () {
        var up = th.getAttribute('aria-sort') !== 'ascending';
        Array.prototype.forEach.call(heads, function (h) { h.removeAttribute('aria-sort'); });
        th.setAttribute('aria-sort', up ? 'ascending' : 'descending');
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (a, b) {
          var x = key(a.cells[i]), y = key(b.cells[i]);
          var c = (x[0] - y[0]) || (x[1] < y[1] ? -1 : (x[1] > y[1] ? 1 : 0));
          return up ? c : -c;
        });
        rows.forEach(function (r) { body.appendChild(r); });
      });
    });
  });
  document.querySelectorAll('input.filter').forEach(function (box) {
    var table = document.getElementById(box.getAttribute('data-table'));
    box.addEventListener('input', function () {
      var words = box.value.toLowerCase().split(/\\s+/).filter(Boolean), shown = 0;
      Array.prototype.forEach.call(table.tBodies[0].rows, function (r) {
        var text = r.textContent.toLowerCase();
        r.hidden = !words.every(function (w) { return text.indexOf(w) >= 0; });
        if (!r.hidden) shown += 1;
      });
      box.nextElementSibling.textContent = shown + ' shown';
    });
  });
  window.addEventListener('load', function () {
    document.body.setAttribute('data-loaded-ms', String(Math.round(performance.now())));
  });
})();"""


#: Tables longer than this scroll in a box of their own (header kept in view).
SCROLL_ROWS = 25


def sortable_table(table_id: str, headers: Sequence[str], rows: Iterable[str], *,
                   filter_hint: str = "filter rows (e.g. a batch or a flag)") -> str:
    """A table whose columns sort on click, with a filter box above it.

    ``headers`` are HTML; ``rows`` are ready ``<tr>...</tr>`` strings. A long table scrolls
    in its own box so a cohort of hundreds of ROIs does not bury the sections after it.
    """
    rows = list(rows)
    head = "".join(f"<th>{h}</th>" for h in headers)
    return (f'<div class="filterbar"><label>{escape(filter_hint)} <input class="filter" type="search" '
            f'data-table="{escape(table_id)}" title="{escape(filter_hint)}"></label>'
            f'<span class="note">{len(rows)} row(s)</span></div>'
            f'<div class="{"scroll" if len(rows) > SCROLL_ROWS else "plain"}">'
            f'<table class="sortable" id="{escape(table_id)}"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>')


def section_batches(batches: list[Mapping], samples: Mapping[str, Mapping], alpha: float,
                    fold: float) -> str:
    """The batch section: ROIs per batch and the channels whose batches differ."""
    from ..quality import BATCH_METRICS, MIN_BATCH_ROIS

    out = ['<section id="batches"><h2>Batches</h2>']
    if not samples:
        out.append("<p>No sample sheet (samples.csv with file,batch): batches are not compared.</p>"
                   "</section>")
        return "\n".join(out)
    counts: dict[str, int] = {}
    for row in samples.values():
        counts[row.get("batch", "")] = counts.get(row.get("batch", ""), 0) + 1
    out.append('<div class="tiles">' + "".join(
        f'<div class="tile"><b>{n}</b>batch {escape(b)}</div>' for b, n in sorted(counts.items())) + "</div>")
    metrics = ", ".join(f"{escape(k)} ({escape(v)})" for k, v in BATCH_METRICS.items())
    out.append(
        '<p class="note">Per channel and stage, the batches are compared on each ROI\'s '
        f"{metrics} with the Kruskal&ndash;Wallis H test (Kruskal &amp; Wallis 1952; chi-squared "
        "approximation with k &minus; 1 degrees of freedom, ties corrected). A channel shows a "
        f"<span class=\"chip batch-effect\">batch-effect</span> when p &lt; {alpha:g} and the "
        f"highest batch median is at least {fold:g} &times; the lowest (recipe [quality] "
        f"batch_alpha, batch_fold). Batches with fewer than {MIN_BATCH_ROIS} ROIs take no part. "
        "Within each batch, ROIs far from their own batch are flagged "
        '<span class="chip batch-outlier">batch-outlier</span> (modified z-score of log SBR, '
        "as for cohort outliers).</p>")
    if not batches:
        out.append("<p>Too few ROIs per batch to compare.</p></section>")
        return "\n".join(out)
    differing = sorted({(d["channel"], d["stage"]) for d in batches if d["differs"]})
    if differing:
        names = ", ".join(f"{escape(c)} ({escape(s)})" for c, s in differing)
        out.append(f'<p><b>{len(differing)} channel &times; stage pair(s) differ between batches:'
                   f"</b> {names}.</p>")
    else:
        out.append("<p>No channel differs between batches beyond the thresholds.</p>")
    rows = []
    for d in batches:
        medians = "; ".join(f"{escape(b)}: {_num(v)}" for b, v in d["medians"].items())
        verdict = '<span class="chip batch-effect">batch-effect</span>' if d["differs"] else "&ndash;"
        rows.append(f"<tr><td>{escape(d['channel'])}</td><td>{escape(d['stage'])}</td><td>{escape(d['metric'])}</td>"
                    f"<td class=\"num\">{d['batches']}</td><td class=\"num\">{d['rois']}</td>"
                    f"<td class=\"num\">{_num(d['h'])}</td>"
                    f"<td class=\"num\" data-v=\"{d['p']:.6g}\">{d['p']:.2g}</td>"
                    f"<td class=\"num\">{_num(d['fold'])}</td><td>{escape(d['high'])} / {escape(d['low'])}</td>"
                    f"<td>{medians}</td><td>{verdict}</td></tr>")
    out.append(sortable_table("batch-table", ["channel", "stage", "metric", "batches", "ROIs", "H",
                                              "p", "fold", "high / low", "batch medians", "verdict"],
                              rows))
    out.append("</section>")
    return "\n".join(out)



def _num(value) -> str:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "&ndash;"
    if not math.isfinite(value):
        return "&infin;" if value > 0 else "&ndash;"
    return f"{value:.3g}" if abs(value) < 10 or abs(value) >= 1000 else f"{value:.1f}"
