"""The cohort report: one self-contained static HTML page from a run folder.

:func:`write_report` reads a run folder (``ledger.jsonl``, ``quality.csv``,
``recipe.toml`` and the spillover matrix beside it, the raw inputs and washed outputs)
and writes ``report.html``: a single file with every image embedded as base64 PNG and
all styling inline, so it opens offline and can be mailed or archived as it is.

Contents: the cautions; a summary per ROI; heatmaps of the signal-to-background ratio
(SBR) per ROI and channel, raw and washed; the flags; cohort outliers by the modified
z-score; the spillover matrix used; the fraction of signal each step removed; small raw,
washed and removed thumbnails per channel; provenance (versions and hashes).
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import math
import struct
import zlib
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .steps.registry import STEPS

#: ROIs that get raw / washed / removed thumbnails (cohort outliers and flagged ROIs first).
THUMBNAIL_ROIS = 4
#: Longest side of a thumbnail, pixels.
THUMBNAIL_SIZE = 96
#: Robust contrast: these percentiles of the raw thumbnail map to black and white.
CONTRAST_PERCENTILES = (1.0, 99.5)
#: Heatmaps show at most this many ROIs (the rest are listed in the tables).
HEATMAP_ROIS = 120

_STEPS = tuple(s.name for s in STEPS)
_STEP_TITLES = {s.name: s.label for s in STEPS}
CAUTIONS = (
    "Research use only. Washed images are not for clinical diagnosis.",
    "Keep the raw data: the washed stacks are derived from it and never replace it.",
    "Cleaning can remove real signal. Look at the removed maps and the removed fractions "
    "below before trusting a washed channel, above all for rare or dim markers.",
    "Quality flags and outliers are prompts to look, not verdicts.",
)

_CSS = """
:root { --ink: #1d2430; --muted: #5f6b7a; --line: #d9dee5; --panel: #f6f7f9;
        --band: #23395b; --accent: #b5651d; --good: #2e7d5b; --bad: #a4343a; }
* { box-sizing: border-box; }
body { margin: 0; font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif;
       color: var(--ink); background: #fff; }
header { background: var(--band); color: #fff; padding: 18px 28px; }
header h1 { margin: 0 0 4px 0; font-size: 22px; font-weight: 600; letter-spacing: .2px; }
header p { margin: 0; color: #d6deea; }
main { padding: 8px 28px 40px; max-width: 1500px; }
h2 { font-size: 17px; margin: 28px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
h3 { font-size: 15px; margin: 18px 0 6px; }
p.note { color: var(--muted); margin: 4px 0 10px; }
.cautions { border-left: 5px solid var(--accent); background: #fbf4ec; padding: 10px 16px; margin: 16px 0; }
.cautions ul { margin: 4px 0; padding-left: 20px; }
.tiles { display: flex; gap: 14px; flex-wrap: wrap; margin: 10px 0; }
.tile { background: var(--panel); border: 1px solid var(--line); padding: 8px 14px; min-width: 120px; }
.tile b { display: block; font-size: 20px; }
table { border-collapse: collapse; margin: 6px 0 12px; font-size: 13px; }
th, td { border: 1px solid var(--line); padding: 3px 8px; text-align: left; vertical-align: top;
         overflow-wrap: anywhere; }
th { background: var(--panel); font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.hash, span.hash { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 12px; }
.ok { color: var(--good); font-weight: 600; } .failed { color: var(--bad); font-weight: 600; }
.chip { display: inline-block; padding: 0 7px; margin: 1px 2px; border-radius: 9px; font-size: 12px;
        background: #e8ebf0; border: 1px solid #c6ccd6; }
.chip.empty { background: #ece6f5; border-color: #b9a8d6; }
.chip.low-sbr { background: #fdf0d8; border-color: #e0b66a; }
.chip.saturated { background: #fde2e0; border-color: #d98c86; }
.chip.striped { background: #dff0f2; border-color: #86bcc4; }
.chip.outlier { background: #f6dcea; border-color: #cf8db1; }
img.plot { max-width: 100%; height: auto; border: 1px solid var(--line); }
.cards { display: flex; flex-wrap: wrap; gap: 10px; }
figure.card { margin: 0; padding: 6px 8px; border: 1px solid var(--line); background: var(--panel); }
figure.card figcaption { display: flex; justify-content: space-between; gap: 10px; font-size: 12px; }
figure.card figcaption span { color: var(--muted); }
figure.card div { display: flex; gap: 3px; align-items: flex-start; }
figure.card img { image-rendering: pixelated; background: #000; }
figure.card .kinds span { flex: 1; text-align: center; font-size: 11px; color: var(--muted); }
span.missing { display: inline-block; width: 60px; text-align: center; }
details { margin: 6px 0 12px; } summary { cursor: pointer; color: var(--band); }
pre { background: var(--panel); border: 1px solid var(--line); padding: 8px; overflow-x: auto; font-size: 12px; }
footer { color: var(--muted); font-size: 12px; padding: 14px 28px; border-top: 1px solid var(--line); }
"""


def write_report(out_dir, *, output=None, thumbnail_rois: int = THUMBNAIL_ROIS) -> Path:
    """Write the cohort report of a run folder as one self-contained HTML file.

    Parameters
    ----------
    out_dir : str or Path
        A run folder written by :func:`plexwash.qc.run.run_cohort`.
    output : str or Path, optional
        Where to write the report (default ``<out_dir>/report.html``).
    thumbnail_rois : int
        How many ROIs get raw / washed / removed thumbnails of every channel (cohort
        outliers and flagged ROIs first, then by name).

    Returns
    -------
    Path
        The report file (written atomically).

    Raises
    ------
    InputError
        When the folder holds no ledger.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> from plexwash.qc.io import write_ome_tiff
    >>> from plexwash.qc.run import run_cohort
    >>> tmp = pathlib.Path(tempfile.mkdtemp()); (tmp / "c").mkdir()
    >>> _ = write_ome_tiff(tmp / "c" / "a.ome.tiff", np.ones((2, 32, 32), np.float32), ["X1", "X2"])
    >>> _ = run_cohort(tmp / "c", tmp / "run", progress=False)
    >>> path = write_report(tmp / "run", output=tmp / "again.html")
    >>> "<img" in path.read_text()
    True
    """
    from .errors import InputError
    from .files import write_atomic
    from .run import LEDGER, REPORT

    out_dir = Path(out_dir)
    if not (out_dir / LEDGER).is_file():
        raise InputError(out_dir, f"no {LEDGER}: not a plexwash run folder")
    context = _gather(out_dir)
    page = _render(context, thumbnail_rois=thumbnail_rois)
    target = Path(output) if output is not None else out_dir / REPORT
    write_atomic(target, page)
    return target


# --------------------------------------------------------------------------- data


def _gather(out_dir: Path) -> dict:
    from .run import QUALITY, RECIPE, latest_records, quality_table, read_ledger, read_quality_csv

    records = read_ledger(out_dir)
    latest = latest_records(records)
    rows = read_quality_csv(out_dir / QUALITY) if (out_dir / QUALITY).is_file() else []
    if not rows:
        rows = quality_table(out_dir)
    for row in rows:
        if isinstance(row.get("flags"), str):
            row["flags"] = [f for f in row["flags"].split(";") if f]
    recipe_text, recipe = None, None
    matrix, matrix_error = None, None
    if (out_dir / RECIPE).is_file():
        from .recipe import load_recipe

        recipe_text = (out_dir / RECIPE).read_text(encoding="utf-8")
        try:
            recipe = load_recipe(out_dir / RECIPE)
        except Exception as exc:  # the report still shows what it can
            matrix_error = f"recipe could not be read: {exc}"
        spill = recipe.spillover_path() if recipe is not None else None
        if spill is not None:
            try:
                from .spillover import read_spillover

                matrix = read_spillover(spill)
            except Exception as exc:
                matrix_error = f"spillover matrix could not be read: {exc}"
    return {"out_dir": out_dir, "records": records, "latest": latest, "rows": rows,
            "recipe": recipe, "recipe_text": recipe_text, "matrix": matrix,
            "matrix_error": matrix_error}


def _names(latest: Mapping) -> list[str]:
    return sorted(latest)


# --------------------------------------------------------------------------- page


def _render(ctx: dict, *, thumbnail_rois: int) -> str:
    from ._version import __version__

    latest = ctx["latest"]
    names = _names(latest)
    done = [n for n in names if latest[n].get("status") == "done"]
    failed = [n for n in names if latest[n].get("status") != "done"]
    rows = ctx["rows"]
    from .quality import ROI_FLAGS

    flagged = {(r["roi"], r["channel"]) for r in rows
               if any(f not in ROI_FLAGS for f in r.get("flags") or [])}
    outliers = [r for r in rows if "outlier" in (r.get("flags") or [])]
    now = _dt.datetime.now().astimezone().isoformat(timespec="seconds")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="generator" content="plexwash">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>plexwash report: {_e(ctx['out_dir'].name)}</title>",
        f"<style>{_CSS}</style></head><body>",
        "<header><h1>plexwash cohort report</h1>",
        f"<p>Run folder {_e(ctx['out_dir'])} &middot; written {_e(now)} by plexwash {_e(__version__)}</p>",
        "</header><main>",
        _section_cautions(),
        _section_summary(latest, names, done, failed, flagged, outliers),
        _section_sbr(rows, done),
        _section_flags(rows),
        _section_outliers(outliers, rows),
        _section_removed(latest, done),
        _section_spillover(ctx["matrix"], ctx["matrix_error"], ctx["recipe"]),
        _section_thumbnails(ctx, done, rows, thumbnail_rois),
        _section_provenance(ctx, names, now),
        "</main>",
        "<footer>Generated by plexwash. Research use only; not for clinical diagnosis. "
        "Keep the raw data. Regenerate with <code>plexwash report RUN_FOLDER</code>.</footer>",
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def _section_cautions() -> str:
    items = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    return f'<section id="cautions" class="cautions"><h2>Cautions</h2><ul>{items}</ul></section>'


def _section_summary(latest, names, done, failed, flagged, outliers) -> str:
    tiles = [("ROIs", len(names)), ("washed", len(done)), ("failed", len(failed)),
             ("flagged ROI &times; channel", len(flagged)), ("cohort outliers", len(outliers))]
    out = ['<section id="summary"><h2>Summary</h2><div class="tiles">']
    out += [f'<div class="tile"><b>{v}</b>{k}</div>' for k, v in tiles]
    out.append("</div>")
    out.append("<table><tr><th>ROI</th><th>status</th><th>shape (C &times; Y &times; X)</th>"
               "<th>median SBR raw</th><th>median SBR washed</th><th>ROI flags</th>"
               "<th>seconds</th><th>error</th></tr>")
    for name in names:
        rec = latest[name]
        status = rec.get("status", "?")
        shape = " &times; ".join(str(n) for n in rec.get("shape") or []) or "&ndash;"
        med = rec.get("median_sbr") or {}
        roi_flags = sorted(set((rec.get("roi_flags") or {}).get("raw", []))
                           | set((rec.get("roi_flags") or {}).get("washed", [])))
        out.append(
            f"<tr><td>{_e(name)}</td><td class=\"{'ok' if status == 'done' else 'failed'}\">"
            f"{_e(status)}</td><td>{shape}</td><td class=\"num\">{_num(med.get('raw'))}</td>"
            f"<td class=\"num\">{_num(med.get('washed'))}</td><td>{_chips(roi_flags)}</td>"
            f"<td class=\"num\">{_num(rec.get('seconds'))}</td><td>{_e(rec.get('error', ''))}</td></tr>")
    out.append("</table></section>")
    return "\n".join(out)


def _sbr_grid(rows, rois, stage):
    channels = []
    for row in rows:
        if row.get("stage") == stage and row["channel"] not in channels:
            channels.append(row["channel"])
    grid = np.full((len(rois), len(channels)), np.nan)
    index_roi = {r: i for i, r in enumerate(rois)}
    index_ch = {c: j for j, c in enumerate(channels)}
    for row in rows:
        if row.get("stage") == stage and row["roi"] in index_roi and row["channel"] in index_ch:
            value = _float(row.get("sbr"))
            if value is not None and value > 0:
                grid[index_roi[row["roi"]], index_ch[row["channel"]]] = value
    return grid, channels


def _section_sbr(rows, done) -> str:
    out = ['<section id="sbr"><h2>Signal-to-background ratio per ROI and channel</h2>']
    rois = [r for r in done if any(row["roi"] == r for row in rows)][:HEATMAP_ROIS]
    if not rois:
        out.append("<p>No washed ROI yet.</p></section>")
        return "\n".join(out)
    raw, channels = _sbr_grid(rows, rois, "raw")
    washed, channels_w = _sbr_grid(rows, rois, "washed")
    out.append('<p class="note">SBR = mean(foreground) / mean(background), foreground split by '
               "Otsu's threshold on the log-scaled channel; colour is log<sub>10</sub> SBR, the "
               "same scale in both panels. Grey cells: not measured.</p>")
    out.append(_img(_plot_sbr(raw, washed, rois, channels, channels_w), "SBR heatmaps raw and washed"))
    if len(done) > HEATMAP_ROIS:
        out.append(f'<p class="note">Showing the first {HEATMAP_ROIS} of {len(done)} ROIs.</p>')
    out.append("</section>")
    return "\n".join(out)


def _section_flags(rows) -> str:
    from .quality import ROI_FLAGS

    out = ['<section id="flags"><h2>Flags</h2>',
           '<p class="note"><span class="chip empty">empty</span> no foreground distinguishable '
           'from background and spillover ghosts; <span class="chip low-sbr">low-sbr</span> SBR '
           'below the recipe\'s threshold; <span class="chip saturated">saturated</span> pixels '
           'at the detector maximum; <span class="chip outlier">outlier</span> far from the '
           'cohort (below). ROI-level flags (<span class="chip striped">striped</span>: rows or '
           'columns dropping out across channels) are listed in the summary.</p>']
    table: dict[tuple, dict] = {}
    for row in rows:
        flags = [f for f in row.get("flags") or [] if f not in ROI_FLAGS]
        if flags:
            entry = table.setdefault((row["roi"], row["channel"]), {"label": row.get("label")})
            entry[row.get("stage")] = (flags, row.get("sbr"))
    if not table:
        out.append("<p>No channel is flagged.</p></section>")
        return "\n".join(out)
    out.append("<table><tr><th>ROI</th><th>channel</th><th>label</th><th>raw flags</th>"
               "<th>raw SBR</th><th>washed flags</th><th>washed SBR</th></tr>")
    for (roi, channel), entry in sorted(table.items()):
        cells = []
        for stage in ("raw", "washed"):
            flags, sbr = entry.get(stage, ([], None))
            cells.append(f"<td>{_chips(flags)}</td><td class=\"num\">{_num(sbr)}</td>")
        out.append(f"<tr><td>{_e(roi)}</td><td>{_e(channel)}</td><td>{_e(entry['label'] or '')}</td>"
                   f"{''.join(cells)}</tr>")
    out.append(f'</table><p class="note">{len(table)} flagged ROI &times; channel pair(s).</p>'
               "</section>")
    return "\n".join(out)


def _section_outliers(outliers, rows) -> str:
    from .run import OUTLIER_CUTOFF, OUTLIER_MIN_ROIS

    out = ['<section id="outliers"><h2>Cohort outliers</h2>',
           '<p class="note">For each channel and stage, the modified z-score of log(SBR) across '
           "ROIs, M = 0.6745 (x &minus; median) / MAD (MAD: median absolute deviation); an ROI is "
           f"an outlier when |M| &gt; {OUTLIER_CUTOFF:g} (Iglewicz &amp; Hoaglin 1993; "
           "NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.5.17). Outliers are called once "
           f"the cohort has {OUTLIER_MIN_ROIS} ROIs or more; the scores are in quality.csv "
           "(column sbr_modified_z).</p>"]
    if not outliers:
        n_rois = len({r["roi"] for r in rows})
        if n_rois < OUTLIER_MIN_ROIS:
            out.append(f"<p>{n_rois} ROI(s) measured: too few to call outliers.</p></section>")
        else:
            out.append(f"<p>No outlier among {n_rois} ROIs.</p></section>")
        return "\n".join(out)
    out.append("<table><tr><th>ROI</th><th>channel</th><th>stage</th><th>SBR</th>"
               "<th>modified z</th></tr>")
    for row in sorted(outliers, key=lambda r: -abs(_float(r.get("sbr_modified_z")) or 0.0)):
        out.append(f"<tr><td>{_e(row['roi'])}</td><td>{_e(row['channel'])}</td>"
                   f"<td>{_e(row.get('stage'))}</td><td class=\"num\">{_num(row.get('sbr'))}</td>"
                   f"<td class=\"num\">{_num(row.get('sbr_modified_z'))}</td></tr>")
    out.append("</table></section>")
    return "\n".join(out)


def _removed_grid(latest, rois, step):
    channels = []
    for name in rois:
        for channel in (latest[name].get("removed_fraction") or {}).get(step, {}):
            if channel not in channels:
                channels.append(channel)
    grid = np.full((len(rois), len(channels)), np.nan)
    for i, name in enumerate(rois):
        values = (latest[name].get("removed_fraction") or {}).get(step, {})
        for j, channel in enumerate(channels):
            v = _float(values.get(channel))
            if v is not None:
                grid[i, j] = v
    return grid, channels


def _section_removed(latest, done) -> str:
    out = ['<section id="removed"><h2>Signal removed by each step</h2>',
           '<p class="note">Fraction of each channel\'s signal that a step took away (its '
           "removed map summed over the ROI, over the signal entering the step). Large values "
           "on a real stain mean over-cleaning: check the removed maps below.</p>"]
    rois = done[:HEATMAP_ROIS]
    steps = [s for s in _STEPS if any(s in (latest[n].get("removed_fraction") or {}) for n in rois)]
    if not rois or not steps:
        out.append("<p>No step ran.</p></section>")
        return "\n".join(out)
    out.append("<table><tr><th>ROI</th>" + "".join(
        f"<th>{_e(_STEP_TITLES[s])}: mean / max %</th>" for s in steps) + "</tr>")
    for name in rois:
        cells = []
        for step in steps:
            values = [v for v in ((latest[name].get("removed_fraction") or {}).get(step) or {}).values()
                      if v is not None]
            if values:
                cells.append(f"<td class=\"num\">{100 * np.mean(values):.2f} / {100 * max(values):.2f}</td>")
            else:
                cells.append("<td>&ndash;</td>")
        out.append(f"<tr><td>{_e(name)}</td>{''.join(cells)}</tr>")
    out.append("</table>")
    grids = [(step, *_removed_grid(latest, rois, step)) for step in steps]
    out.append(_img(_plot_removed(grids, rois), "removed fraction heatmaps per step"))
    out.append("</section>")
    return "\n".join(out)


def _section_spillover(matrix, error, recipe) -> str:
    out = ['<section id="spillover"><h2>Spillover matrix used</h2>']
    if matrix is None:
        if error:
            out.append(f"<p class=\"failed\">{_e(error)}</p>")
        elif recipe is not None and not recipe.compensation.enabled:
            out.append("<p>Compensation is disabled in the recipe.</p>")
        else:
            out.append("<p>No spillover matrix was given: compensation did not run.</p>")
        out.append("</section>")
        return "\n".join(out)
    values = np.asarray(matrix.values, float)
    off = values.copy()
    np.fill_diagonal(off, 0.0)
    out.append('<p class="note">Entry (row i, column j): fraction of channel i\'s signal measured '
               "in channel j, in percent; the diagonal (1) is left blank. "
               f"Largest off-diagonal entry {100 * off.max():.3g} %; "
               f"{int(np.count_nonzero(off > 0))} non-zero pairs.</p>")
    out.append(_img(_plot_spillover(off, list(matrix.channels)), "spillover matrix heatmap"))
    pairs = sorted(((values[i, j], matrix.channels[i], matrix.channels[j])
                    for i in range(len(values)) for j in range(len(values))
                    if i != j and values[i, j] > 0), reverse=True)
    if pairs:
        out.append("<details><summary>Non-zero pairs</summary><table><tr><th>from</th><th>into</th>"
                   "<th>%</th></tr>")
        out += [f"<tr><td>{_e(a)}</td><td>{_e(b)}</td><td class=\"num\">{100 * v:.3g}</td></tr>"
                for v, a, b in pairs]
        out.append("</table></details>")
    out.append("</section>")
    return "\n".join(out)


def _thumbnail_choice(done, rows, limit) -> list[str]:
    """Outlier ROIs first, then flagged ones, then the rest by name."""
    def rank(name):
        flags = [f for r in rows if r["roi"] == name for f in (r.get("flags") or [])]
        return (0 if "outlier" in flags else 1 if flags else 2, name)

    return sorted(done, key=rank)[:max(0, limit)]


def _section_thumbnails(ctx, done, rows, limit) -> str:
    out = ['<section id="thumbnails"><h2>Before and after</h2>',
           '<p class="note">Per channel: raw, washed, and what the wash removed (raw &minus; '
           "washed). Raw and washed share one contrast per channel (black and white at the "
           f"percentiles {CONTRAST_PERCENTILES[0]:g} and {CONTRAST_PERCENTILES[1]:g} of the raw "
           "thumbnail); the removed map has its own, so faint removals show. Thumbnails are "
           "block means, downsampled to at most "
           f"{THUMBNAIL_SIZE} px.</p>"]
    chosen = _thumbnail_choice(done, rows, limit)
    if not chosen:
        out.append("<p>No washed ROI.</p></section>")
        return "\n".join(out)
    if len(done) > len(chosen):
        out.append(f'<p class="note">Showing {len(chosen)} of {len(done)} ROIs (cohort outliers '
                   "and flagged ROIs first).</p>")
    for name in chosen:
        out.append(_roi_thumbnails(ctx, name))
    out.append("</section>")
    return "\n".join(out)


def _roi_thumbnails(ctx, name) -> str:
    from .io import read_roi

    rec = ctx["latest"][name]
    out = [f"<h3>{_e(name)}</h3>"]
    raw_path = Path(rec.get("input") or "")
    washed_path = ctx["out_dir"] / rec["output"] if rec.get("output") else None
    try:
        raw_roi = read_roi(raw_path)
        raw = downsample(raw_roi.data, THUMBNAIL_SIZE)
    except Exception as exc:
        raw = None
        out.append(f'<p class="note">Raw input not shown ({_e(exc)}).</p>')
    try:
        washed = downsample(read_roi(washed_path).data, THUMBNAIL_SIZE) if washed_path else None
    except Exception as exc:
        washed = None
        out.append(f'<p class="note">Washed output not shown ({_e(exc)}).</p>')
    if raw is None and washed is None:
        return "\n".join(out)
    channels = rec.get("channels") or []
    labels = rec.get("labels") or channels
    removed_fraction = rec.get("removed_fraction") or {}
    out.append('<div class="cards">')
    for c, channel in enumerate(channels):
        lo, hi = robust_range(raw[c] if raw is not None else washed[c])
        images = [_thumb(image[c] if image is not None else None, lo, hi, f"{channel} {kind}")
                  for image, kind in ((raw, "raw"), (washed, "washed"))]
        if raw is not None and washed is not None:
            gone = np.maximum(raw[c] - washed[c], 0.0)
            top = max(float(np.percentile(gone, CONTRAST_PERCENTILES[1])), 1e-12)
            images.append(_thumb(gone, 0.0, top, f"{channel} removed"))
        else:
            images.append(_thumb(None, 0.0, 1.0, ""))
        total = combined_removed_fraction(
            [(removed_fraction.get(s) or {}).get(channel) for s in _STEPS])
        label = labels[c] if c < len(labels) else channel
        title = _e(channel) + (f" &middot; {_e(label)}" if label != channel else "")
        out.append(f'<figure class="card"><figcaption><b>{title}</b><span>removed '
                   f"{100 * total:.1f} %</span></figcaption><div>{''.join(images)}</div>"
                   "<div class=\"kinds\"><span>raw</span><span>washed</span><span>removed</span></div>"
                   "</figure>")
    out.append("</div>")
    return "\n".join(out)


def _thumb(image, lo, hi, alt) -> str:
    if image is None:
        return '<span class="missing">&ndash;</span>'
    grey = to_grey(image, lo, hi)
    data = base64.b64encode(png_grey(grey)).decode("ascii")
    h, w = grey.shape
    return (f'<img src="data:image/png;base64,{data}" width="{w}" height="{h}" '
            f'alt="{_e(alt)}">')


def _section_provenance(ctx, names, now) -> str:
    latest = ctx["latest"]
    versions = sorted({str(latest[n].get("version")) for n in names})
    recipe_hashes = sorted({str(latest[n].get("recipe_sha256")) for n in names})
    spill_hashes = sorted({str(latest[n].get("spillover_sha256")) for n in names})
    panel_hashes = sorted({str(latest[n].get("panel_sha256")) for n in names})
    out = ['<section id="provenance"><h2>Provenance</h2>',
           "<table>",
           f"<tr><th>report written</th><td>{_e(now)}</td></tr>",
           f"<tr><th>plexwash version(s)</th><td>{_e(', '.join(versions))}</td></tr>",
           f"<tr><th>recipe sha256</th><td class=\"hash\">{'<br>'.join(map(_e, recipe_hashes))}</td></tr>",
           f"<tr><th>spillover sha256</th><td class=\"hash\">{'<br>'.join(map(_e, spill_hashes))}</td></tr>",
           f"<tr><th>panel sha256</th><td class=\"hash\">{'<br>'.join(map(_e, panel_hashes))}</td></tr>",
           f"<tr><th>ledger records</th><td>{len(ctx['records'])} attempt(s) for {len(names)} ROI(s)</td></tr>",
           "</table>",
           "<table><tr><th>ROI</th><th>input</th><th>input sha256</th><th>output</th>"
           "<th>output sha256</th><th>started</th><th>finished</th><th>host</th></tr>"]
    for name in names:
        rec = latest[name]
        out.append(f"<tr><td>{_e(name)}</td><td>{_e(rec.get('input'))}</td>"
                   f"<td class=\"hash\">{_e(rec.get('input_sha256'))}</td>"
                   f"<td>{_e(rec.get('output'))}</td>"
                   f"<td class=\"hash\">{_e(rec.get('output_sha256'))}</td>"
                   f"<td>{_e(rec.get('started'))}</td><td>{_e(rec.get('finished'))}</td>"
                   f"<td>{_e(rec.get('host'))}</td></tr>")
    out.append("</table>")
    if ctx["recipe_text"]:
        out.append(f"<details><summary>Recipe used (recipe.toml)</summary><pre>{_e(ctx['recipe_text'])}"
                   "</pre></details>")
    out.append("</section>")
    return "\n".join(out)


# --------------------------------------------------------------------------- plots


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


def _plot_sbr(raw, washed, rois, channels, channels_w) -> bytes:
    logs = [np.log10(g) for g in (raw, washed)]
    finite = np.concatenate([g[np.isfinite(g)] for g in logs]) if raw.size else np.array([])
    vmin, vmax = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
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


def _plot_removed(grids, rois) -> bytes:
    n_cols = max(max((len(c) for _, _, c in grids), default=1), 1)
    fig = _figure(*_grid_size(len(rois), n_cols, len(grids)))
    axes = np.atleast_1d(fig.subplots(1, len(grids), sharey=True))
    top = max([float(np.nanmax(g)) for _, g, _ in grids if np.isfinite(g).any()] + [1e-4])
    image = None
    for ax, (step, grid, channels) in zip(axes, grids, strict=True):
        image = _heat(ax, 100 * grid, rois, channels, cmap="PuBuGn", vmin=0.0, vmax=100 * top,
                      title=_STEP_TITLES[step]) or image
    if image is not None:
        fig.colorbar(image, ax=list(axes), shrink=0.9, label="% of signal removed")
    return _png_of(fig)


def _plot_spillover(off, channels) -> bytes:
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


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img class="plot" src="data:image/png;base64,{data}" alt="{_e(alt)}">'


# --------------------------------------------------------------------------- thumbnails


def downsample(stack, size: int = THUMBNAIL_SIZE) -> np.ndarray:
    """Block means of a (C, Y, X) stack so the longer side is at most ``size`` pixels.

    A dask stack is reduced chunk by chunk (``dask.array.coarsen``), so memory stays
    bounded; the edge rows / columns that do not fill a block are dropped.

    Examples
    --------
    >>> downsample(np.arange(16.0).reshape(1, 4, 4), 2)[0].tolist()
    [[2.5, 4.5], [10.5, 12.5]]
    """
    n_c, n_y, n_x = stack.shape
    factor = max(1, math.ceil(max(n_y, n_x) / size))
    ny, nx = (n_y // factor) * factor, (n_x // factor) * factor
    if type(stack).__module__.startswith("dask"):
        import dask.array as da

        cropped = stack[:, :ny, :nx].astype(np.float64)
        return np.asarray(da.coarsen(np.mean, cropped, {1: factor, 2: factor}).compute())
    cropped = np.asarray(stack[:, :ny, :nx], dtype=np.float64)
    return cropped.reshape(n_c, ny // factor, factor, nx // factor, factor).mean(axis=(2, 4))


def combined_removed_fraction(fractions) -> float:
    """Fraction of a channel's raw signal that a chain of steps removed in all.

    Each step's fraction is relative to the signal entering it, so the remainder after
    all steps is the product of ``1 - f`` (missing steps count as 0).

    Examples
    --------
    >>> round(combined_removed_fraction([0.5, None, 0.5]), 6)
    0.75
    """
    kept = 1.0
    for f in fractions:
        kept *= 1.0 - (f or 0.0)
    return 1.0 - kept


def robust_range(image, percentiles=CONTRAST_PERCENTILES) -> tuple[float, float]:
    """Display range from two percentiles (robust to hot pixels); never empty.

    Examples
    --------
    >>> robust_range(np.arange(101.0), (0, 100))
    (0.0, 100.0)
    """
    lo, hi = (float(v) for v in np.percentile(np.asarray(image, float), percentiles))
    if hi <= lo:
        hi = lo + 1.0
    return lo, hi


def to_grey(image, lo: float, hi: float) -> np.ndarray:
    """Map ``lo .. hi`` linearly to 0 .. 255 (clipped), as uint8."""
    scaled = (np.asarray(image, float) - lo) / (hi - lo)
    return np.clip(np.round(255.0 * scaled), 0, 255).astype(np.uint8)


def png_grey(image) -> bytes:
    """Encode a 2-D uint8 array as an 8-bit greyscale PNG (no dependency beyond zlib).

    Each scanline uses the "Up" filter (difference to the row above), which suits smooth
    images (PNG specification, ISO/IEC 15948, filter type 2).

    Examples
    --------
    >>> png_grey(np.zeros((2, 3), np.uint8))[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    image = np.ascontiguousarray(image, dtype=np.uint8)
    if image.ndim != 2:
        raise ValueError("png_grey needs a 2-D array")
    h, w = image.shape
    up = image.astype(np.int16)
    up[1:] -= image[:-1]
    filtered = np.empty((h, w + 1), np.uint8)
    filtered[:, 0] = 2
    filtered[0, 0] = 0  # the first row has no row above: filter "None"
    filtered[:, 1:] = (up % 256).astype(np.uint8)
    filtered[0, 1:] = image[0]

    def chunk(kind: bytes, payload: bytes) -> bytes:
        return (struct.pack(">I", len(payload)) + kind + payload
                + struct.pack(">I", zlib.crc32(kind + payload) & 0xFFFFFFFF))

    header = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", zlib.compress(filtered.tobytes(), 9)) + chunk(b"IEND", b""))


# --------------------------------------------------------------------------- text helpers


def _e(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _float(value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def _num(value) -> str:
    value = _float(value)
    if value is None:
        return "&ndash;"
    if abs(value) >= 1000:
        return f"{value:.3g}"
    return f"{value:.3g}" if abs(value) < 10 else f"{value:.1f}"


def _chips(flags: Sequence[str]) -> str:
    return "".join(f'<span class="chip {_e(f)}">{_e(f)}</span>' for f in flags) or "&ndash;"
