"""The report's crosstalk audit and segmentation composites: one section, read from the run folder.

* Crosstalk audit (``audit.csv``): one plot per declared pair, co-positivity of every ROI
  raw and washed, with what chance alone gives; flagged rows listed below it.
* Composites (the ledger's composites event and ``<roi>.composite.ome.tiff``): the
  cohort-wide percentiles used, and one thumbnail per ROI (nuclear blue, membrane yellow).
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from .style import escape, img_tag

#: Composite thumbnails shown at most (the rest are counted).
COMPOSITE_THUMBNAILS = 400


def plot_audit(rows: Sequence[Mapping]) -> bytes:
    """One panel per pair: co-positivity per ROI, raw (grey) to washed (blue), expected by
    chance for washed (black ticks), washed rows flagged ``crosstalk-left`` ringed red."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    pairs = list(dict.fromkeys((r["first"], r["second"]) for r in rows))
    fig = Figure(figsize=(min(14.0, 4.5 * len(pairs) + 1), 3.2), dpi=100)
    fig.patch.set_facecolor("white")
    legend = {}
    for k, pair in enumerate(pairs):
        ax = fig.add_subplot(1, len(pairs), k + 1)
        mine = [r for r in rows if (r["first"], r["second"]) == pair]
        rois = list(dict.fromkeys(r["roi"] for r in mine))
        stage = {(r["roi"], r["stage"]): r for r in mine}
        x = np.arange(len(rois))

        def values(name, key, stage=stage, rois=rois):
            out = [stage.get((roi, name), {}).get(key) for roi in rois]
            return np.array([np.nan if v is None else float(v) for v in out])

        raw, washed = values("raw", "co_positive"), values("washed", "co_positive")
        expected = values("washed", "expected")
        ax.vlines(x, np.fmin(raw, washed), np.fmax(raw, washed), color="#b8bec7", lw=1)
        ax.plot(x, raw, "o", color="#8a9099", ms=4, label="raw")
        ax.plot(x, washed, "o", color="#1f5fae", ms=4, label="washed")
        ax.plot(x, expected, "_", color="black", ms=9, mew=1.5, label="chance (washed)")
        bad = [i for i, roi in enumerate(rois)
               if "crosstalk-left" in (stage.get((roi, "washed"), {}).get("flags") or [])]
        if bad:
            ax.plot(x[bad], washed[bad], "o", mfc="none", mec="#c0392b", ms=9, mew=1.5,
                    label="crosstalk-left")
        first, second = mine[0].get("first_marker") or pair[0], mine[0].get("second_marker") or pair[1]
        ax.set_title(f"{first} / {second}", fontsize=10)
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel(f"ROI ({len(rois)})", fontsize=8)
        if len(rois) <= 30:
            ax.set_xticks(x)
            ax.set_xticklabels(rois, rotation=90, fontsize=6)
        else:
            ax.set_xticks([])
        if k == 0:
            ax.set_ylabel("co-positive", fontsize=9)
        for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
            legend.setdefault(label, handle)
    # one legend for every panel, above them (never over the points)
    fig.legend(list(legend.values()), list(legend), loc="lower center", ncol=len(legend),
               fontsize=7, frameon=False, bbox_to_anchor=(0.5, 0.98))
    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    return buffer.getvalue()


def composite_thumbnail(composite, size: int = 96) -> bytes:
    """A PNG of a (2, Y, X) composite in [0, 1]: nuclear blue, membrane yellow."""
    from matplotlib.image import imsave

    from .thumbnails import downsample

    small = np.clip(downsample(np.asarray(composite, np.float64), size), 0.0, 1.0)
    nuclear, membrane = small[0], small[1]
    rgb = np.stack([membrane, membrane, nuclear], axis=-1)
    buffer = io.BytesIO()
    imsave(buffer, rgb, format="png")
    return buffer.getvalue()


def section_audit_and_composites(out_dir) -> str:
    """The report section (empty text when the run has neither an audit nor composites)."""
    from ..audit import AUDIT, read_audit_csv
    from ..composite import composite_name, read_composite_event

    out = Path(out_dir)
    rows = read_audit_csv(out / AUDIT)
    event = read_composite_event(out)
    if not rows and not event:
        return ""
    parts = ['<section id="audit-composites"><h2>Crosstalk audit and composites</h2>']
    if rows:
        flagged = [r for r in rows if r["flags"]]
        parts.append(
            "<h3>Crosstalk audit</h3><p>For each pair of markers declared mutually exclusive: "
            "<em>co-positive</em> is the share of the rarer marker's positive bins that are also "
            "positive for the other; <em>chance</em> is the same share if the two were "
            "independent in this tissue. Washed values above chance (one-sided hypergeometric "
            "test) that look like spillover are flagged <code>crosstalk-left</code>; "
            "<code>co-occur</code> means the markers share cells at comparable levels (check the "
            "declaration).</p>")
        parts.append(img_tag(plot_audit(rows), "co-positivity per pair and ROI, raw and washed"))
        if flagged:
            parts.append("<table><tr><th>ROI</th><th>pair</th><th>stage</th><th>co-positive</th>"
                         "<th>chance</th><th>p</th><th>flags</th></tr>")
            for r in flagged:
                parts.append(
                    f"<tr><td>{escape(r['roi'])}</td><td>{escape(r.get('first_marker') or r['first'])} / "
                    f"{escape(r.get('second_marker') or r['second'])}</td><td>{escape(r['stage'])}</td>"
                    f"<td class=\"num\">{_n(r['co_positive'])}</td><td class=\"num\">{_n(r['expected'])}</td>"
                    f"<td class=\"num\">{_n(r['p_value'])}</td><td>{escape(', '.join(r['flags']))}</td></tr>")
            parts.append("</table>")
    if event:
        parts.append(
            f"<h3>Composites for segmentation</h3><p>Each contributing channel clipped at the "
            f"cohort-wide {event['low_percentile']:g}th and {event['high_percentile']:g}th "
            f"percentiles of its washed values, scaled to [0, 1] and combined by "
            f"{escape(event['combine'])}.</p>")
        parts.append("<table><tr><th>channel</th><th>role</th><th>low</th><th>high</th></tr>")
        for name, (low, high) in event["percentiles"].items():
            parts.append(f"<tr><td>{escape(name)}</td><td>{escape(event['roles'].get(name))}</td>"
                         f"<td class=\"num\">{_n(low)}</td><td class=\"num\">{_n(high)}</td></tr>")
        parts.append("</table><div class=\"thumbs\">")
        from ..io import read_roi

        shown = 0
        for roi in event["rois"][:COMPOSITE_THUMBNAILS]:
            path = out / composite_name(roi)
            if not path.is_file():
                continue
            png = composite_thumbnail(read_roi(path).data)
            parts.append(f"<figure>{img_tag(png, f'composite of {roi}')}<figcaption>{escape(roi)}"
                         "</figcaption></figure>")
            shown += 1
        parts.append("</div>")
        if len(event["rois"]) > shown:
            parts.append(f"<p>{len(event['rois']) - shown} more composite(s) in the run folder.</p>")
    parts.append("</section>")
    return "\n".join(parts)




def _n(value) -> str:
    return "&ndash;" if value is None else f"{float(value):.3g}"
