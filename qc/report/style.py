"""The report page's inline stylesheet (one self-contained HTML file, no external CSS)."""

CSS = """
:root { --ink: #1d2430; --muted: #5f6b7a; --line: #d9dee5; --stains: #f6f7f9;
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
.tile { background: var(--stains); border: 1px solid var(--line); padding: 8px 14px; min-width: 120px; }
.tile b { display: block; font-size: 20px; }
table { border-collapse: collapse; margin: 6px 0 12px; font-size: 13px; }
th, td { border: 1px solid var(--line); padding: 3px 8px; text-align: left; vertical-align: top;
         overflow-wrap: anywhere; }
th { background: var(--stains); font-weight: 600; }
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
figure.card { margin: 0; padding: 6px 8px; border: 1px solid var(--line); background: var(--stains); }
figure.card figcaption { display: flex; justify-content: space-between; gap: 10px; font-size: 12px; }
figure.card figcaption span { color: var(--muted); }
figure.card div { display: flex; gap: 3px; align-items: flex-start; }
figure.card img { image-rendering: pixelated; background: #000; }
figure.card .kinds span { flex: 1; text-align: center; font-size: 11px; color: var(--muted); }
span.missing { display: inline-block; width: 60px; text-align: center; }
details { margin: 6px 0 12px; } summary { cursor: pointer; color: var(--band); }
pre { background: var(--stains); border: 1px solid var(--line); padding: 8px; overflow-x: auto; font-size: 12px; }
.chip.batch-outlier { background: #f3e1d6; border-color: #c99272; }
.chip.batch-effect { background: #e4e0f7; border-color: #9a8fd0; }
table.sortable thead th { cursor: pointer; position: sticky; top: 0; }
table.sortable th[aria-sort=ascending]::after { content: " \\25B2"; font-size: 9px; }
table.sortable th[aria-sort=descending]::after { content: " \\25BC"; font-size: 9px; }
div.scroll { max-height: 30em; overflow: auto; border: 1px solid var(--line); display: inline-block;
              max-width: 100%; }
div.scroll table { margin: 0; }
table.sortable thead th { z-index: 1; }
.filterbar { display: flex; gap: 10px; align-items: center; margin: 6px 0 2px; }
.filterbar input { font: inherit; padding: 2px 6px; width: 22em; border: 1px solid var(--line); }
details.channel { margin: 4px 0; } details.channel > summary { font-weight: 600; }
.group h4 { margin: 6px 0 2px; font-size: 13px; } .group h4 span { color: var(--muted); font-weight: 400; }
.sheet { display: flex; flex-wrap: wrap; gap: 2px; }
.sheet i { display: block; background-color: #000; background-repeat: no-repeat; outline: 1px solid #000; }
.sheet i.o { outline: 2px solid #d0342c; } .sheet i.e { outline: 2px solid #8a6cc2; }
.sheet i.f { outline: 2px solid #e0a030; }
figure.heat { margin: 6px 0 16px; max-width: 100%; overflow-x: auto; }
.hm { display: flex; align-items: flex-start; gap: 12px; }
.hm-rows { padding-top: 18px; font-size: 10px; line-height: var(--ch); white-space: nowrap; text-align: right; }
.hm-title { height: 18px; line-height: 18px; font-size: 12px; font-weight: 600; text-align: center; }
.hm-img { display: block; image-rendering: pixelated; }
.hm-cols { display: flex; }
.hm-cols span { flex: 0 0 var(--cw); width: var(--cw); line-height: var(--cw); font-size: 10px;
                writing-mode: vertical-rl; transform: rotate(180deg); white-space: nowrap; padding-bottom: 3px; }
.hm-none { color: var(--muted); padding: 24px 12px; }
.hm-scale { width: 320px; margin: 8px 0 0; font-size: 11px; }
.hm-scale i { display: block; height: 12px; border: 1px solid var(--line); }
.hm-ticks { display: flex; justify-content: space-between; }
.hm-label { text-align: center; color: var(--muted); }
table.matrix { margin: 0; font-size: 9px; }
table.matrix caption { font-size: 12px; font-weight: 600; text-align: left; padding-bottom: 4px;
                       white-space: nowrap; }
table.matrix td { width: 26px; min-width: 26px; height: 16px; padding: 0; border: 1px solid #fff;
                  text-align: center; font-variant-numeric: tabular-nums; }
table.matrix th { background: none; border: 0; padding: 0 4px; font-size: 10px; font-weight: 400;
                  text-align: right; white-space: nowrap; overflow-wrap: normal; }
table.matrix thead th { vertical-align: bottom; text-align: center; padding: 0 0 3px; }
table.matrix thead th span { writing-mode: vertical-rl; transform: rotate(180deg); }
footer { color: var(--muted); font-size: 12px; padding: 14px 28px; border-top: 1px solid var(--line); }
"""


def escape(value) -> str:
    """``value`` as HTML text (``None`` as empty), quotes escaped."""
    import html

    return html.escape("" if value is None else str(value), quote=True)


def img_tag(png: bytes, alt: str) -> str:
    """A PNG inlined as a data URI (the report opens offline)."""
    import base64

    data = base64.b64encode(png).decode("ascii")
    return f'<img class="plot" src="data:image/png;base64,{data}" alt="{escape(alt)}">'
