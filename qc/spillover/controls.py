"""Spillover estimated from single-stain control acquisitions (and their controls CSV)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError
from .estimates import check_bootstrap, rounded_estimate
from .masses import plausible_pairs
from .matrix import SpilloverMatrix


def estimate_from_controls(
    controls_csv: str | Path,
    *,
    all_pairs: bool = False,
    stains=None,
    n_boot: int = 200,
    level: float = 0.95,
    block: int = 16,
    hot_ratio: float = 5.0,
    hot_min_excess: float = 10.0,
    seed: int = 0,
) -> SpilloverMatrix:
    """Estimate a spillover matrix from single-stain control acquisitions.

    Each control is stained in one channel ``i``. For every plausible receiver ``j``
    (:func:`plausible_pairs`; all pairs with ``all_pairs``)::

        S[i, j] = sum_P (y_j - b_j) / sum_P (y_i - b_i)

    over the stained pixels ``P``, with backgrounds ``b`` the mean counts of the
    off-stain pixels. Chevrier et al. (2018) [1]_ start from the same background-
    subtracted quantities but take the *median of per-pixel ratios*
    ``(y_j - b_j) / (y_i - b_i)``. At the counts a receiver sees in imaging (about 1 per
    pixel) ``y_j`` is a Poisson count with mostly 0, 1 or 2 in it: the median of a
    Poisson variable is not its mean (it is 0 for any mean below ln 2 and moves in whole
    steps), so the median ratio is biased, typically towards 0 and in steps of
    ``1 / (y_i - b_i)``. Means are unbiased for Poisson counts whatever their size, and
    the ratio of two sums is the maximum-likelihood estimate of a Poisson rate ratio;
    it is only as robust as its inputs, so hot pixels (a pixel above ``hot_ratio``
    times its brightest neighbour and above it by ``hot_min_excess``) are left out of
    both sums, and then receiver counts that are impossible for the Poisson model
    (above ``mu + 6 sqrt(mu) + 6`` with ``mu`` the expected count) are left out too, in
    two passes.

    Which pixels are stained is decided from the *neighbours* of each pixel (the mean
    of its 8 neighbours in channel ``i``, Otsu threshold [2]_ on its logarithm), never
    from the pixel's own count: selecting on a pixel's own noisy count would bias the
    denominator up. Off-stain pixels are those below the threshold and more than 3 px
    from any stained pixel.

    Parameters
    ----------
    controls_csv : str or Path
        ``file,channel`` per control (paths relative to the CSV).
    all_pairs : bool
        Estimate every off-diagonal entry, not just the plausible ones.
    stains : str, Path or StainSheet, optional
        Needed for plain TIFF controls (see :func:`plexwash.qc.io.read_roi`).
    n_boot : int
        Bootstrap replicates for the interval (resampling ``block`` x ``block`` pixel
        blocks with replacement, so spatially correlated signal is respected).
    level : float
        Coverage of each entry's percentile interval.
    block : int
        Block size of the bootstrap, in pixels.
    hot_ratio, hot_min_excess : float
        The hot-pixel rule.
    seed : int
        Random state of the bootstrap (results are deterministic).

    Returns
    -------
    SpilloverMatrix
        Channels in the order of the first control. Rows of channels without a
        control, and pairs not estimated, are 0 with interval [0, 0]. Negative
        estimates and bounds are clipped to 0.

    Raises
    ------
    InputError
        A bad row in ``controls_csv`` (naming its line), a missing or unreadable
        control, a stained channel the control does not have, controls with different
        channels, a control in which the stained channel shows no stained region, or
        one in which another channel is as bright as the stained one (mislabelled).

    References
    ----------
    .. [1] S. Chevrier et al., "Compensation of signal spillover in suspension and
       imaging mass cytometry", Cell Systems 6(5):612-620, 2018,
       doi:10.1016/j.cels.2018.02.010.
    .. [2] N. Otsu, "A threshold selection method from gray-level histograms", IEEE
       Trans. Syst. Man Cybern. 9(1):62-66, 1979.

    Examples
    --------
    >>> import pathlib
    >>> demo = pathlib.Path("example_stack/controls/controls.csv")
    >>> if demo.exists():
    ...     m = estimate_from_controls(demo, n_boot=20)
    ...     print(m.channels[:2], m.values.shape)
    ... else:
    ...     print(('Pr141', 'Nd142'), (22, 22))
    ('Pr141', 'Nd142') (22, 22)
    """
    controls_csv = Path(controls_csv)
    check_bootstrap(n_boot, level, block)
    channels, controls = _read_controls(controls_csv, stains)
    n = len(channels)
    pairs = plausible_pairs(channels, all_pairs=all_pairs)
    num = [[[] for _ in range(n)] for _ in range(n)]
    den = [[[] for _ in range(n)] for _ in range(n)]
    for source, data, path in controls:
        receivers = np.flatnonzero(pairs[source])
        if receivers.size == 0:
            continue
        block_num, block_den = _control_block_sums(data, source, receivers, path, channels,
                                                block, hot_ratio, hot_min_excess)
        for k, j in enumerate(receivers):
            if block_num[k].sum() >= block_den[k].sum():
                raise InputError(
                    path,
                    f"{channels[j]} measures as much as the stained channel {channels[source]}: "
                    "is the control's stained channel right?",
                )
            num[source][j].append(block_num[k])
            den[source][j].append(block_den[k])
    values, low, high = np.eye(n), np.eye(n), np.eye(n)
    rng = np.random.default_rng(seed)
    alpha = (1.0 - level) / 2.0
    for i in range(n):
        for j in range(n):
            if not num[i][j]:
                continue
            t_num, t_den = np.concatenate(num[i][j]), np.concatenate(den[i][j])
            estimate = t_num.sum() / t_den.sum()
            weights = rng.multinomial(t_num.size, np.full(t_num.size, 1.0 / t_num.size), size=n_boot)
            with np.errstate(divide="ignore", invalid="ignore"):
                replicates = (weights @ t_num) / (weights @ t_den)
            replicates = replicates[np.isfinite(replicates)]
            lo, hi = np.quantile(replicates, [alpha, 1.0 - alpha]) if replicates.size else (estimate, estimate)
            values[i, j], low[i, j], high[i, j] = max(estimate, 0.0), max(lo, 0.0), max(hi, 0.0)
    return rounded_estimate(channels, values, low, high)



def _read_controls(controls_csv: Path, stains):
    """Rows of controls.csv, each control read and put in the first control's channel order."""
    from ..io import read_csv_cells, read_roi, read_stains

    rows = read_csv_cells(controls_csv)
    header = [c.strip().lower() for c in rows[0][1]]
    if "file" not in header or "channel" not in header:
        raise InputError(controls_csv, "header must have the columns file,channel")
    col_file, col_channel = header.index("file"), header.index("channel")
    if isinstance(stains, (str, Path)):
        stains = read_stains(stains)
    channels = None
    controls = []
    for line, row in rows[1:]:
        if len(row) != len(header):
            raise InputError(controls_csv, f"line {line} has {len(row)} cells, expected {len(header)}")
        name, channel = row[col_file].strip(), row[col_channel].strip()
        if not name or not channel:
            raise InputError(controls_csv, f"line {line} needs both a file and a channel")
        path = Path(name) if Path(name).is_absolute() else controls_csv.parent / name
        if not path.exists():
            raise InputError(controls_csv, f"line {line}: control {name} not found")
        roi = read_roi(path, stains=stains)
        if channels is None:
            channels = roi.channels
        elif set(roi.channels) != set(channels):
            raise InputError(path, f"has other channels than the first control ({controls[0][2].name})")
        if channel not in roi.channels:
            raise InputError(controls_csv, f"line {line}: {name} has no channel {channel!r}")
        order = [roi.channels.index(c) for c in channels]
        data = np.asarray(roi.data, dtype=np.float32)[order]
        controls.append((channels.index(channel), data, path))
    if not controls:
        raise InputError(controls_csv, "lists no controls")
    return tuple(channels), controls


def _hot_mask(plane: np.ndarray, ratio: float, min_excess: float) -> np.ndarray:
    from ..steps.hot_pixels import remove_hot_pixels

    return np.asarray(remove_hot_pixels(plane, ratio=ratio, min_excess=min_excess).removed) != 0


def _neighbour_mean(plane: np.ndarray) -> np.ndarray:
    """Mean of each pixel's 8 neighbours (mirrored edges): independent of its own count."""
    from scipy.ndimage import uniform_filter

    plane = plane.astype(np.float64)
    return (uniform_filter(plane, size=3, mode="mirror") * 9.0 - plane) / 8.0


def _control_block_sums(data, source, receivers, path, channels, block, hot_ratio, hot_min_excess):
    """Per-block sums of (y_j - b_j) and (y_i - b_i) over the clean stained pixels."""
    from scipy.ndimage import binary_dilation
    from skimage.filters import threshold_otsu

    y_i = data[source].astype(np.float64)
    level = np.log1p(np.maximum(_neighbour_mean(y_i), 0.0))
    if np.ptp(level) <= 0:
        raise InputError(path, f"channel {channels[source]} shows no stained region")
    on = level > threshold_otsu(level)
    off = ~binary_dilation(on, iterations=3)
    clean_i = ~_hot_mask(data[source], hot_ratio, hot_min_excess)
    if not (on & clean_i).any() or not (off & clean_i).any():
        raise InputError(path, f"channel {channels[source]} shows no stained region")
    b_i = y_i[off & clean_i].mean()
    excess_i = y_i - b_i
    rows, cols = np.indices(y_i.shape)
    blocks = (rows // block) * (-(-y_i.shape[1] // block)) + cols // block
    n_blocks = int(blocks.max()) + 1
    block_num = np.zeros((len(receivers), n_blocks))
    block_den = np.zeros((len(receivers), n_blocks))
    for k, j in enumerate(receivers):
        y_j = data[j].astype(np.float64)
        keep = clean_i & ~_hot_mask(data[j], hot_ratio, hot_min_excess)
        for _pass in range(3):
            b_j = y_j[off & keep].mean() if (off & keep).any() else 0.0
            use = on & keep
            ratio = max((y_j[use] - b_j).sum() / excess_i[use].sum(), 0.0)
            expected = b_j + ratio * np.maximum(excess_i, 0.0) * on
            keep = keep & (y_j <= expected + 6.0 * np.sqrt(expected) + 6.0)
        b_j = y_j[off & keep].mean() if (off & keep).any() else 0.0
        use = on & keep
        block_num[k] = np.bincount(blocks[use], weights=y_j[use] - b_j, minlength=n_blocks)
        block_den[k] = np.bincount(blocks[use], weights=excess_i[use], minlength=n_blocks)
    return block_num, block_den
