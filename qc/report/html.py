"""The report page: :func:`write_report` gathers a run folder and renders its sections.

Each section is a function returning HTML text; plots come from :mod:`.plots` and
thumbnails from :mod:`.thumbnails`, both embedded as base64 PNG.
"""

from __future__ import annotations

import base64
import datetime as _dt
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .._version import __version__
from ..errors import InputError
from ..files import write_atomic
from ..ledger import LEDGER, QUALITY, RECIPE, REPORT, latest_records, read_ledger
from ..quality import ROI_FLAGS
from ..steps.registry import STEP_NAMES, step
from ..table import (
    OUTLIER_CUTOFF,
    OUTLIER_MIN_ROIS,
    batch_table,
    quality_table,
    read_quality_csv,
    read_samples_copy,
)
from .handoff import section_audit_and_composites
from .heatmaps import heatmap_html
from .plots import batch_matrices, section_spillover
from .sheets import grouped, section_sheets
from .style import CSS, escape
from .tables import SCRIPT, section_batches, sortable_table
from .thumbnails import (
    CONTRAST_PERCENTILES,
    THUMBNAIL_SIZE,
    combined_removed_fraction,
    downsample,
    png_grey,
    read_thumbnail,
    robust_range,
    to_grey,
)

#: ROIs that get raw / washed / removed thumbnails (cohort outliers and flagged ROIs first).
THUMBNAIL_ROIS = 4
#: ROIs per heatmap image: larger cohorts get one image per page of this many (per batch or slide).
HEATMAP_ROIS = 100

CAUTIONS = (
    "Research use only. Washed images are not for clinical diagnosis.",
    "Keep the raw data: the washed stacks are derived from it and never replace it.",
    "Cleaning can remove real signal. Look at the removed maps and the removed fractions "
    "below before trusting a washed channel, above all for rare or dim markers.",
    "Quality flags and outliers are prompts to look, not verdicts.",
)


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
        from ..recipe import load_recipe

        recipe_text = (out_dir / RECIPE).read_text(encoding="utf-8")
        try:
            recipe = load_recipe(out_dir / RECIPE)
        except Exception as exc:  # the report still shows what it can
            matrix_error = f"recipe could not be read: {exc}"
        spill = recipe.spillover_path() if recipe is not None else None
        if spill is not None:
            try:
                from ..spillover import read_spillover

                matrix = read_spillover(spill)
            except Exception as exc:
                matrix_error = f"spillover matrix could not be read: {exc}"
    quality = recipe.quality if recipe is not None else None
    return {"out_dir": out_dir, "records": records, "latest": latest, "rows": rows,
            "recipe": recipe, "recipe_text": recipe_text, "matrix": matrix,
            "matrix_error": matrix_error, "samples": _samples(out_dir, latest),
            "batches": batch_table(rows, quality), "quality": quality}


def _samples(out_dir: Path, latest: Mapping) -> dict[str, dict]:
    """Each ROI's sample columns from the run's sheet copy (only ROIs the ledger knows)."""
    return {name: row for name, row in read_samples_copy(out_dir).items() if name in latest}


def _names(latest: Mapping) -> list[str]:
    return sorted(latest)


# --------------------------------------------------------------------------- page


def _render(ctx: dict, *, thumbnail_rois: int) -> str:
    latest = ctx["latest"]
    names = _names(latest)
    done = [n for n in names if latest[n].get("status") == "done"]
    failed = [n for n in names if latest[n].get("status") != "done"]
    rows = ctx["rows"]
    flagged = {(r["roi"], r["channel"]) for r in rows
               if any(f not in ROI_FLAGS for f in r.get("flags") or [])}
    outliers = [r for r in rows if {"outlier", "batch-outlier"} & set(r.get("flags") or [])]
    now = _dt.datetime.now().astimezone().isoformat(timespec="seconds")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="generator" content="plexwash">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>plexwash report: {escape(ctx['out_dir'].name)}</title>",
        f"<style>{CSS}</style></head><body>",
        "<header><h1>plexwash cohort report</h1>",
        f"<p>Run folder {escape(ctx['out_dir'])} &middot; written {escape(now)} by plexwash {escape(__version__)}</p>",
        "</header><main>",
        _section_cautions(),
        _section_summary(latest, names, done, failed, flagged, outliers, ctx["samples"]),
        _section_sbr(rows, done, ctx["samples"]),
        _section_batches(ctx),
        _section_flags(rows),
        _section_outliers(outliers, rows),
        _section_removed(latest, done, ctx["samples"]),
        section_spillover(ctx["matrix"], ctx["matrix_error"], ctx["recipe"],
                          batch_matrices(ctx["out_dir"], ctx["recipe"], ctx["latest"], ctx["samples"])),
        section_sheets(ctx, done, rows),
        _section_thumbnails(ctx, done, rows, thumbnail_rois),
        section_audit_and_composites(ctx["out_dir"]),
        _section_provenance(ctx, names, now),
        "</main>",
        "<footer>Generated by plexwash. Research use only; not for clinical diagnosis. "
        "Keep the raw data. Regenerate with <code>plexwash report RUN_FOLDER</code>.</footer>",
        f"<script>{SCRIPT}</script>",
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def _section_cautions() -> str:
    items = "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS)
    return f'<section id="cautions" class="cautions"><h2>Cautions</h2><ul>{items}</ul></section>'


def _section_summary(latest, names, done, failed, flagged, outliers, samples) -> str:
    tiles = [("ROIs", len(names)), ("washed", len(done)), ("failed", len(failed)),
             ("flagged ROI &times; channel", len(flagged)), ("cohort outliers", len(outliers))]
    columns = _sample_columns(samples)
    out = ['<section id="summary"><h2>Summary</h2><div class="tiles">']
    out += [f'<div class="tile"><b>{v}</b>{k}</div>' for k, v in tiles]
    out.append("</div>")
    flagged_count: dict[str, int] = {}
    for roi, _ in flagged:
        flagged_count[roi] = flagged_count.get(roi, 0) + 1
    rows = []
    for name in names:
        rec = latest[name]
        status = rec.get("status", "?")
        shape = " &times; ".join(str(n) for n in rec.get("shape") or []) or "&ndash;"
        med = rec.get("median_sbr") or {}
        roi_flags = sorted(set((rec.get("roi_flags") or {}).get("raw", []))
                           | set((rec.get("roi_flags") or {}).get("washed", [])))
        sample = samples.get(name, {})
        rows.append(
            f"<tr><td>{escape(name)}</td>" + "".join(f"<td>{escape(sample.get(c, ''))}</td>" for c in columns)
            + f"<td class=\"{'ok' if status == 'done' else 'failed'}\">"
            f"{escape(status)}</td><td>{shape}</td><td class=\"num\">{_num(med.get('raw'))}</td>"
            f"<td class=\"num\">{_num(med.get('washed'))}</td><td>{_chips(roi_flags)}</td>"
            f"<td class=\"num\">{flagged_count.get(name, 0)}</td>"
            f"<td class=\"num\">{_num(rec.get('seconds'))}</td><td>{escape(rec.get('error', ''))}</td></tr>")
    headers = ["ROI", *map(escape, columns), "status", "shape (C &times; Y &times; X)", "median SBR raw",
               "median SBR washed", "ROI flags", "flagged channels", "seconds", "error"]
    out.append(sortable_table("summary-table", headers, rows))
    out.append("</section>")
    return "\n".join(out)


def _sample_columns(samples: Mapping[str, Mapping]) -> list[str]:
    columns: list[str] = []
    for row in samples.values():
        columns.extend(c for c in row if c not in columns)
    return columns


def _pages(names: Sequence[str], samples: Mapping) -> list[tuple[str, list[str]]]:
    """Heatmap pages: ROIs by batch (or slide), at most HEATMAP_ROIS per page."""
    pages = []
    for group, members in grouped(names, samples):
        count = math.ceil(len(members) / HEATMAP_ROIS)
        for k in range(count):
            part = members[k * HEATMAP_ROIS:(k + 1) * HEATMAP_ROIS]
            title = (f"{group} " if group else "") + (f"(ROIs {k * HEATMAP_ROIS + 1}&ndash;"
                                                       f"{k * HEATMAP_ROIS + len(part)} of {len(members)})"
                                                       if count > 1 else "")
            pages.append((escape(title.strip()).replace("&amp;ndash;", "&ndash;"), part))
    return pages


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


def _section_sbr(rows, done, samples) -> str:
    out = ['<section id="sbr"><h2>Signal-to-background ratio per ROI and channel</h2>']
    measured = {row["roi"] for row in rows}
    rois = [r for r in done if r in measured]
    if not rois:
        out.append("<p>No washed ROI yet.</p></section>")
        return "\n".join(out)
    out.append('<p class="note">SBR = mean(foreground) / mean(background), foreground split by '
               "Otsu's threshold on the log-scaled channel; colour is log<sub>10</sub> SBR, the "
               "same scale in both panels. SBR and SNR are measured inside the tissue (Otsu split of "
               "the summed channels), glass left out. Grey cells: not measured."
               + (f" ROIs are shown by batch or slide, at most {HEATMAP_ROIS} per image." if
                  len(rois) > HEATMAP_ROIS or any("/" in r for r in rois) or samples else "")
               + "</p>")
    values = [_float(r.get("sbr")) for r in rows if r["roi"] in measured]
    logs = np.log10([v for v in values if v is not None and v > 0] or [1.0, 10.0])
    low, high = float(logs.min()), float(max(logs.max(), logs.min() + 1e-6))  # one scale for all pages
    for title, page in _pages(rois, samples):
        panels = [(stage, np.log10(grid), channels)
                  for stage in ("raw", "washed") for grid, channels in [_sbr_grid(rows, page, stage)]]
        if title:
            out.append(f"<h3>{title}</h3>")
        out.append(heatmap_html(panels, page, vmin=low, vmax=high, cmap="cividis", label="log10 SBR",
                                alt=f"SBR heatmaps raw and washed {title}".strip()))
    out.append("</section>")
    return "\n".join(out)


def _section_batches(ctx) -> str:
    quality = ctx["quality"]
    alpha = quality.batch_alpha if quality is not None else 0.001
    fold = quality.batch_fold if quality is not None else 1.25
    return section_batches(ctx["batches"], ctx["samples"], alpha, fold)


def _section_flags(rows) -> str:
    out = ['<section id="flags"><h2>Flags</h2>',
           '<p class="note"><span class="chip empty">empty</span> no foreground distinguishable '
           'from background and spillover ghosts; <span class="chip low-sbr">low-sbr</span> SBR '
           'below the recipe\'s threshold; <span class="chip saturated">saturated</span> pixels '
           'at the detector maximum; <span class="chip outlier">outlier</span> far from the '
           'cohort, <span class="chip batch-outlier">batch-outlier</span> far from its own batch '
           '(below). ROI-level flags (<span class="chip striped">striped</span>: rows or '
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
    lines = []
    for (roi, channel), entry in sorted(table.items()):
        cells = []
        for stage in ("raw", "washed"):
            flags, sbr = entry.get(stage, ([], None))
            cells.append(f"<td>{_chips(flags)}</td><td class=\"num\">{_num(sbr)}</td>")
        lines.append(f"<tr><td>{escape(roi)}</td><td>{escape(channel)}</td><td>{escape(entry['label'] or '')}</td>"
                     f"{''.join(cells)}</tr>")
    out.append(sortable_table("flag-table", ["ROI", "channel", "label", "raw flags", "raw SBR",
                                             "washed flags", "washed SBR"], lines))
    out.append(f'<p class="note">{len(table)} flagged ROI &times; channel pair(s).</p></section>')
    return "\n".join(out)


def _section_outliers(outliers, rows) -> str:
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
    lines = []
    for row in sorted(outliers, key=lambda r: -abs(_float(r.get("sbr_modified_z")) or 0.0)):
        lines.append(f"<tr><td>{escape(row['roi'])}</td><td>{escape(row.get('batch') or '')}</td>"
                     f"<td>{escape(row['channel'])}</td>"
                     f"<td>{escape(row.get('stage'))}</td><td class=\"num\">{_num(row.get('sbr'))}</td>"
                     f"<td class=\"num\">{_num(row.get('sbr_modified_z'))}</td>"
                     f"<td class=\"num\">{_num(row.get('sbr_batch_modified_z'))}</td>"
                     f"<td>{_chips([f for f in row.get('flags') or [] if 'outlier' in f])}</td></tr>")
    out.append(sortable_table("outlier-table", ["ROI", "batch", "channel", "stage", "SBR", "modified z",
                                                "modified z in batch", "verdict"], lines))
    out.append("</section>")
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


def _section_removed(latest, done, samples) -> str:
    out = ['<section id="removed"><h2>Signal removed by each step</h2>',
           '<p class="note">Fraction of each channel\'s signal that a step took away (its '
           "removed map summed over the ROI, over the signal entering the step). Large values "
           "on a real stain mean over-cleaning: check the removed maps below.</p>"]
    rois = list(done)
    steps = [s for s in STEP_NAMES if any(s in (latest[n].get("removed_fraction") or {}) for n in rois)]
    if not rois or not steps:
        out.append("<p>No step ran.</p></section>")
        return "\n".join(out)
    lines = []
    for name in rois:
        cells = []
        for s in steps:
            values = [v for v in ((latest[name].get("removed_fraction") or {}).get(s) or {}).values()
                      if v is not None]
            if values:
                cells.append(f"<td class=\"num\" data-v=\"{100 * np.mean(values):.6g}\">"
                             f"{100 * np.mean(values):.2f} / {100 * max(values):.2f}</td>")
            else:
                cells.append("<td>&ndash;</td>")
        lines.append(f"<tr><td>{escape(name)}</td>{''.join(cells)}</tr>")
    out.append(sortable_table("removed-table", ["ROI", *(f"{escape(step(s).label)}: mean / max %"
                                                       for s in steps)], lines))
    every = [g for s in steps for g in [_removed_grid(latest, rois, s)[0]] if np.isfinite(g).any()]
    top = max([float(np.nanmax(g)) for g in every] + [1e-4])  # one scale for all pages
    for title, page in _pages(rois, samples):
        panels = [(step(s).label, 100 * grid, channels)
                  for s in steps for grid, channels in [_removed_grid(latest, page, s)]]
        if title:
            out.append(f"<h3>{title}</h3>")
        out.append(heatmap_html(panels, page, vmin=0.0, vmax=100 * top, cmap="PuBuGn",
                                label="% of signal removed",
                                alt=f"removed fraction heatmaps per step {title}".strip()))
    out.append("</section>")
    return "\n".join(out)


def _thumbnail_choice(done, rows, limit) -> list[str]:
    """Outlier ROIs first, then flagged ones, then the rest by name."""
    flags: dict[str, set] = {}
    for row in rows:
        flags.setdefault(row["roi"], set()).update(row.get("flags") or [])

    def rank(name):
        found = flags.get(name, set())
        return (0 if "outlier" in found else 1 if found else 2, name)

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


def _stack_thumbnail(path: Path) -> np.ndarray:
    """The block-mean thumbnail of an ROI file: a TIFF read plane by plane when it can be,
    else (other layouts, OME-Zarr, a damaged file: its error) through ``read_roi``."""
    thumbnail = read_thumbnail(path, THUMBNAIL_SIZE)
    if thumbnail is None:
        from ..io import read_roi

        thumbnail = downsample(read_roi(path).data, THUMBNAIL_SIZE)
    return thumbnail


def _roi_thumbnails(ctx, name) -> str:
    rec = ctx["latest"][name]
    out = [f"<h3>{escape(name)}</h3>"]
    raw_path = Path(rec.get("input") or "")
    washed_path = ctx["out_dir"] / rec["output"] if rec.get("output") else None
    try:
        raw = _stack_thumbnail(raw_path)
    except Exception as exc:
        raw = None
        out.append(f'<p class="note">Raw input not shown ({escape(exc)}).</p>')
    try:
        washed = _stack_thumbnail(washed_path) if washed_path else None
    except Exception as exc:
        washed = None
        out.append(f'<p class="note">Washed output not shown ({escape(exc)}).</p>')
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
            [(removed_fraction.get(s) or {}).get(channel) for s in STEP_NAMES])
        label = labels[c] if c < len(labels) else channel
        title = escape(channel) + (f" &middot; {escape(label)}" if label != channel else "")
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
            f'alt="{escape(alt)}">')


def _section_provenance(ctx, names, now) -> str:
    latest = ctx["latest"]
    versions = sorted({str(latest[n].get("version")) for n in names})
    recipe_hashes = sorted({str(latest[n].get("recipe_sha256")) for n in names})
    spill_hashes = sorted({str(latest[n].get("spillover_sha256")) for n in names})
    stains_hashes = sorted({str(latest[n].get("stains_sha256")) for n in names})
    out = ['<section id="provenance"><h2>Provenance</h2>',
           "<table>",
           f"<tr><th>report written</th><td>{escape(now)}</td></tr>",
           f"<tr><th>plexwash version(s)</th><td>{escape(', '.join(versions))}</td></tr>",
           f"<tr><th>recipe sha256</th><td class=\"hash\">{'<br>'.join(map(escape, recipe_hashes))}</td></tr>",
           f"<tr><th>spillover sha256</th><td class=\"hash\">{'<br>'.join(map(escape, spill_hashes))}</td></tr>",
           f"<tr><th>stains sha256</th><td class=\"hash\">{'<br>'.join(map(escape, stains_hashes))}</td></tr>",
           f"<tr><th>ledger records</th><td>{len(ctx['records'])} attempt(s) for {len(names)} ROI(s)</td></tr>",
           "</table>",
           ]
    lines = []
    for name in names:
        rec = latest[name]
        lines.append(f"<tr><td>{escape(name)}</td><td>{escape(rec.get('input'))}</td>"
                     f"<td class=\"hash\">{escape(rec.get('input_sha256'))}</td>"
                     f"<td>{escape(rec.get('output'))}</td>"
                     f"<td class=\"hash\">{escape(rec.get('output_sha256'))}</td>"
                     f"<td class=\"hash\">{escape((rec.get('spillover_sha256') or '')[:12])}</td>"
                     f"<td>{escape(rec.get('started'))}</td><td>{escape(rec.get('finished'))}</td>"
                     f"<td>{escape(rec.get('host'))}</td></tr>")
    out.append(sortable_table("provenance-table", ["ROI", "input", "input sha256", "output",
                                                   "output sha256", "spillover used (sha256)",
                                                   "started", "finished", "host"], lines))
    if ctx["recipe_text"]:
        out.append(f"<details><summary>Recipe used (recipe.toml)</summary><pre>{escape(ctx['recipe_text'])}"
                   "</pre></details>")
    out.append("</section>")
    return "\n".join(out)




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
    return "".join(f'<span class="chip {escape(f)}">{escape(f)}</span>' for f in flags) or "&ndash;"
