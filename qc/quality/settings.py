"""Quality settings (recipe section ``[quality]``) and the names of the flags."""

from __future__ import annotations

import dataclasses

from ..settings import setting

#: Channel-level flags, in the order they are listed.
CHANNEL_FLAGS = ("empty", "low-sbr", "saturated")


#: ROI-level flags (repeated on every channel row of the quality table).
ROI_FLAGS = ("striped",)


#: Cohort-level flag added by :func:`add_outlier_flags`.
OUTLIER_FLAG = "outlier"


#: Separator of flags (and index lists) when written as text, e.g. in ``quality.csv``.
FLAG_SEPARATOR = ";"


@dataclasses.dataclass(frozen=True)
class QualitySettings:
    """Thresholds of the quality measurements and flags (recipe section ``[quality]``).

    Examples
    --------
    >>> QualitySettings().low_sbr
    3.0
    >>> QualitySettings(low_sbr=5.0).low_sbr
    5.0
    """

    low_sbr: float = setting(
        3.0, "flag low-sbr when the signal-to-background ratio is below this", low=1.0, high=1e6)
    background_floor: float = setting(
        0.01, "smallest background mean and std used in SBR and SNR (guards a zero background)",
        low=0.0, low_open=True, high=1e6)
    smoothing_sigma: float = setting(
        1.0, "Gaussian sigma in pixels applied to the log-scaled channel before the Otsu split",
        low=0.0, high=20.0)
    spike_ratio: float = setting(
        5.0, "a pixel above this times the 2nd largest of its 8 neighbours is a spike (hot pixel)",
        low=1.0, high=1e6)
    spike_excess: float = setting(
        10.0, "... and only when it exceeds that neighbour by at least this many counts",
        low=0.0, high=1e9)
    saturation_level: float = setting(
        0.0, "value counted as saturated; 0 = the detector/dtype maximum (none for float data)",
        low=0.0, high=1e12)
    saturated_fraction: float = setting(
        0.001, "flag saturated when more than this fraction of pixels is at the saturation level",
        low=0.0, high=1.0)
    empty_bin: int = setting(
        4, "side in pixels of the bins the empty test sums counts in", low=1, high=64)
    empty_alpha: float = setting(
        1e-6, "a bin has excess when its count is this improbable under background + ghosts",
        low=0.0, low_open=True, high=0.01)
    fit_alpha: float = setting(
        0.05, "bins this improbable under the current model are left out of the fit",
        low=0.0, low_open=True, high=0.1)
    min_excess: float = setting(
        0.3, "a bin has excess only when it exceeds the model by this many counts per pixel",
        low=0.0, high=1e9)
    min_area: float = setting(
        80.0, "flag empty when bins with excess cover fewer pixels than this", low=1.0, high=1e9)
    ghosts: bool = setting(
        True, "fit each channel as spillover ghosts of the other channels before judging empty")
    max_ghost: float = setting(
        0.1, "largest fraction of another channel's counts that may be explained as its ghost",
        low=0.0, low_open=True, high=1.0)
    counts_per_unit: float = setting(
        1.0, "detector counts per intensity unit (the empty test assumes Poisson counts)",
        low=0.0, low_open=True, high=1e9)
    stripe_drop: float = setting(
        0.5, "flag a row/column striped when it holds below (1 - this) of the lines beside it",
        low=0.0, low_open=True, high=1.0, high_open=True)
    stripe_min_counts: float = setting(
        25.0, "a row (column) is judged only when the lines beside it hold this many counts in "
        "its quiet pixels (all channels)",
        low=0.0, high=1e12)
    stripe_alpha: float = setting(
        1e-6, "... and only when its drop is this improbable under Poisson counts (exact "
        "conditional test of the line's counts against its neighbours')",
        low=0.0, low_open=True, high=0.05)
    in_tissue: bool = setting(
        True, "SBR, SNR and the empty test's background measured inside the tissue (glass apart)")
    plausible_ghosts: bool = setting(
        True, "ghosts only from physically plausible masses (M+-1, same element, M+16) when "
        "channel names carry masses")
    batch_alpha: float = setting(
        0.001, "cohort: flag batch-effect when the batches' Kruskal-Wallis p is below this ...",
        low=0.0, low_open=True, high=0.5)
    batch_fold: float = setting(
        1.25, "... and the highest batch median is at least this many times the lowest",
        low=1.0, high=1e6)


#: The default thresholds (a frozen object, safe as a default argument).
DEFAULT_QUALITY = QualitySettings()
