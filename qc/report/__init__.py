"""The cohort report: one self-contained static HTML page from a run folder.

:func:`write_report` reads a run folder (``ledger.jsonl``, ``quality.csv``,
``recipe.toml`` and the spillover matrix beside it, the raw inputs and washed outputs)
and writes ``report.html``: a single file with every image embedded as base64 PNG and
all styling inline, so it opens offline and can be mailed or archived as it is.

Contents: the cautions; a summary per ROI; heatmaps of the signal-to-background ratio
(SBR) per ROI and channel, raw and washed; the flags; cohort outliers by the modified
z-score; the spillover matrix used; the fraction of signal each step removed; small raw,
washed and removed thumbnails per channel; provenance (versions and hashes).

Modules: :mod:`.html` (the page and its sections), :mod:`.heatmaps` (heatmaps drawn from
numpy, labels in HTML), :mod:`.plots` (the spillover section, drawn as the heatmaps are),
:mod:`.thumbnails` (image helpers), :mod:`.style` (the stylesheet). The report reads a
run folder through :mod:`plexwash.qc.ledger` and :mod:`plexwash.qc.table` and never
imports the run (which calls :func:`write_report` once, at its end).
"""

from ..ledger import REPORT
from .html import CAUTIONS, HEATMAP_ROIS, THUMBNAIL_ROIS, write_report
from .thumbnails import (
    CONTRAST_PERCENTILES,
    THUMBNAIL_SIZE,
    combined_removed_fraction,
    downsample,
    png_grey,
    robust_range,
    to_grey,
)

__all__ = [
    "CAUTIONS",
    "CONTRAST_PERCENTILES",
    "HEATMAP_ROIS",
    "REPORT",
    "THUMBNAIL_ROIS",
    "THUMBNAIL_SIZE",
    "combined_removed_fraction",
    "downsample",
    "png_grey",
    "robust_range",
    "to_grey",
    "write_report",
]
