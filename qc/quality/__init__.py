"""Channel quality: SBR, SNR, saturation, empty and striped channels, cohort outliers.

Every channel is measured on its own (:func:`measure_channel`); a whole ROI
(:func:`measure_stack`) adds what needs all channels at once: judging a channel
``empty`` after explaining it as spillover ghosts of the other channels, and
``striped`` rows or columns that drop out across channels. Across a cohort,
:func:`cohort_outliers` flags ROIs whose metric is far from the other ROIs'
(modified z-score). :func:`quality_rows` turns results into rows of the quality
table (``quality.csv``, ``inspect --json``); :func:`measure_roi` is the one entry point
that measures an ROI raw (and washed) the way a run does, for ``inspect``, the run and
the studio.

Modules: :mod:`.settings` (thresholds, flag names), :mod:`.channel` (one channel),
:mod:`.excess` (the excess test's model fits), :mod:`.stack` (one ROI: ghosts,
stripes), :mod:`.cohort` (outliers, batch test), :mod:`.rows` (table rows, :func:`measure_roi`),
:mod:`.order` (``numpy.percentile``'s values by radix selection), :mod:`._kernels` (compiled
one-pass kernels, each reproducing the numpy/scipy steps it replaces to the bit).

How a channel is measured
-------------------------
1. **Isolated spikes** (hot pixels, alone or two touching) are set to the second
   largest of their 8 neighbours when they exceed ``spike_ratio`` times that value
   and by at least ``spike_excess`` counts (a thresholded neighbour rule, as in the
   hot-pixel step, made to catch touching pairs too).
   All metrics below use this spike-free image, so a few hot pixels neither make
   foreground nor dominate the background statistics; their number is reported
   as ``spikes``. ``p50``, ``p99``, ``maximum`` and ``zero_fraction`` describe
   the values as given.
2. **Split**: Otsu's threshold (reference ``skimage.filters.threshold_otsu``) on
   the channel log-scaled with ``log1p`` (negative values count as 0) and then
   smoothed with a Gaussian of ``smoothing_sigma`` pixels. Smoothing after the
   log keeps the boundary of a bright object where it is (the smoothed log edge
   crosses half-way between the two log levels at the true edge).
3. **SBR** = mean(foreground) / max(mean(background), ``background_floor``);
   the floor keeps a zero background (e.g. after speckle removal) from giving an
   infinite ratio. **SNR** = (mean(fg) - mean(bg)) / max(std(bg),
   ``background_floor``) (Murphy, *Fundamentals of Light Microscopy and
   Electronic Imaging*). Without any foreground pixel, SBR = 1 and SNR = 0.
4. **Saturation**: fraction of (spike-free) pixels at or above the saturation
   level (``saturation_level``, else the detector maximum passed as
   ``dtype_max``, else the integer dtype's maximum; none for float data).
5. **Excess test** (behind ``empty``). The spike-free channel is summed in
   ``empty_bin`` x ``empty_bin`` pixel bins. A model of what the channel would
   hold without a stain of its own is fitted to the bins by least squares: a
   flat background ``b`` counts per pixel, plus, in :func:`measure_stack`,
   spillover ghosts - ``s_i`` times every other channel's bins, each
   ``0 <= s_i <= max_ghost`` (a ghost is a near-exact scaled copy of its source,
   pixel by pixel), or the pattern of a known spillover matrix with a fitted
   scale. Bins the current model cannot explain, ``P(N >= n | mu) < fit_alpha``,
   are left out and the fit repeated until the set is stable. A real stain's own
   pattern is left out this way, so the fit follows the lower envelope - the
   part of the channel that is background plus ghosts - even where the stain
   shares cells with a bright channel; for a failed stain almost nothing is left
   out and the fit is the plain least-squares one. Then a bin carries *excess*
   when its count is improbable under the model, ``P(N >= n | mu) <
   empty_alpha`` (Poisson upper tail, via the regularised incomplete gamma
   function), **and** exceeds it by at least ``min_excess`` counts per pixel;
   the same test on 3 x 3-bin windows (leaving out each window's largest single
   excess, so a stray bright bin does not lend excess to its neighbours) finds
   faint stains spread over a cell. The channel is ``empty`` when the bins with
   excess cover fewer than ``min_area`` pixels. The test treats values as
   Poisson counts in units of ``1 / counts_per_unit``.

   Rule of thumb for the defaults (4 x 4 bins, ``empty_alpha = 1e-6``,
   ``min_excess = 0.3``): a stain of 1 count per pixel in cells over a
   background of 0.02-0.3 is found, as are a few bright cells; ghosts of a few
   percent of bright channels (1-5 counts per pixel) and up to a few hundred
   hot pixels are not excess. Measured alone (:func:`measure_channel`) a channel
   is compared with a flat background only, so ghosts there count as signal.
   The test is built for raw counts: on washed stacks (background removed, the
   remainder of subtracted ghosts over-dispersed) pass the raw result as
   ``reference`` to :func:`measure_stack`, so stains empty before stay empty.

Flags
-----
``empty`` (no foreground distinguishable from background and ghosts),
``low-sbr`` (SBR below ``low_sbr``), ``saturated`` (saturated fraction above
``saturated_fraction``), ``striped`` (ROI-level: some rows or columns drop far
below their neighbours across channels), ``outlier`` (added across a cohort by
:func:`add_outlier_flags`). Flags are independent rules; an empty channel may
also be ``low-sbr``.
"""

from .._lazy import lazy_names

# Names are imported on first use (PEP 562): a recipe needs QualitySettings only, not the
# measurements' numba kernels and scipy.stats.
_WHERE = {
    "ChannelQuality": ".channel", "measure_channel": ".channel", "region_snr": ".channel",
    **dict.fromkeys(("BATCH_EFFECT_FLAG", "BATCH_METRICS", "BATCH_OUTLIER_FLAG", "MIN_BATCH_ROIS",
                     "add_batch_outlier_flags", "add_outlier_flags", "batch_differences",
                     "batch_effect_channels", "cohort_outliers", "kruskal_wallis",
                     "modified_z_scores"), ".cohort"),
    "RoiQuality": ".rows", "measure_roi": ".rows", "quality_rows": ".rows",
    **dict.fromkeys(("CHANNEL_FLAGS", "FLAG_SEPARATOR", "OUTLIER_FLAG", "ROI_FLAGS",
                     "QualitySettings"), ".settings"),
    "StackQuality": ".stack", "channel_threads": ".stack", "measure_stack": ".stack",
}


__getattr__, __dir__ = lazy_names(__name__, globals(), _WHERE)


__all__ = [
    "CHANNEL_FLAGS",
    "FLAG_SEPARATOR",
    "OUTLIER_FLAG",
    "ROI_FLAGS",
    "ChannelQuality",
    "QualitySettings",
    "RoiQuality",
    "StackQuality",
    "BATCH_EFFECT_FLAG",
    "BATCH_METRICS",
    "BATCH_OUTLIER_FLAG",
    "MIN_BATCH_ROIS",
    "add_batch_outlier_flags",
    "add_outlier_flags",
    "batch_differences",
    "batch_effect_channels",
    "kruskal_wallis",
    "channel_threads",
    "cohort_outliers",
    "measure_channel",
    "measure_roi",
    "measure_stack",
    "modified_z_scores",
    "quality_rows",
    "region_snr",
]
