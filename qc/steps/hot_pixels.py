"""Hot pixels: single-pixel spikes, detected then restored from their neighbours.

A pixel is hot when it exceeds the maximum of its 8 neighbours by at least
``min_excess`` counts and either exceeds ``ratio`` times that maximum (thresholded
median replacement, common practice) or sits on a flat structure with an excess that
Poisson noise cannot explain: its brightest neighbour is not significantly brighter than
the brightest pixel two steps out (so it is no peak of a small object) and it exceeds
that neighbour by more than ``flat_sigmas`` Poisson standard deviations. The second test
finds spikes on or beside bright cells, where the ratio test is blind; the peak of a tiny
Gaussian-ish speck falls off steeply from ring 1 to ring 2 and is left alone. Only
detected pixels are restored, with the (low) median of their 8 neighbours (detect, then
restore: Chan, Ho & Nikolova 2005).

Amplitude
    On one channel a one-pixel speck of real stain and a hot pixel look alike: both are
    isolated extreme values that no Poisson count at the local rate explains. What tells
    them apart is how far above its neighbourhood the pixel stands. A real pixel-sized
    object carries at most what the stain puts in one pixel (tens of counts in the tissue
    and demo cohorts); a hot pixel is a detector event that adds hundreds. The margin
    ``min_excess`` (50 counts, the usual hot-pixel threshold of imaging mass cytometry
    preprocessing: common practice, value from memory) is the line between them: below it
    an isolated pixel is left to the speckle step, which keeps it when its value is
    improbable for background (its single-pixel rule, ``lone_alpha``). A channel whose
    stain makes brighter single-pixel objects can raise the margin in the recipe.

Chunked channels run the same kernel under ``map_overlap`` with ``HOT_PIXEL_DEPTH`` (the
8 neighbours and the ring beyond), so every block equals the whole-image result.

References
----------
.. [1] R. H. Chan, C.-W. Ho and M. Nikolova, "Salt-and-pepper noise removal by
   median-type noise detectors and detail-preserving regularization", IEEE Trans.
   Image Process. 14(10):1479-1485, 2005.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Sequence

import numpy as np
from plexwash.qc.steps import _kernels as _k  # absolute: one numba cache, whatever imported us

from .._arrays import as_channel, as_stack, is_dask
from ..settings import build_settings, setting
from .lifting import (
    StepResult,
    kernel_outputs,
    lift_channel,
    per_channel_settings,
    removed_fraction,
    run_stack,
)

__all__ = ["HOT_PIXEL_DEPTH", "HotPixelSettings", "hot_pixels_depth", "hot_pixels_stack", "remove_hot_pixels"]

#: Depth of the hot-pixel rule under ``map_overlap``: the 8 neighbours and the ring beyond.
HOT_PIXEL_DEPTH = 2


@dataclasses.dataclass(frozen=True)
class HotPixelSettings:
    """Hot-pixel step settings (recipe section ``[hot_pixels]``)."""

    enabled: bool = setting(True, "restore single-pixel spikes from their neighbours")
    ratio: float = setting(
        5.0, "a hot pixel exceeds this many times the brightest of its 8 neighbours", low=1.0, high=1000.0
    )
    min_excess: float = setting(
        50.0, "and exceeds that neighbour by at least this many counts (a real one-pixel speck of stain"
        " stays below it; raise it for channels with brighter real single-pixel objects)", low=0.0, high=1e6
    )
    flat_sigmas: float = setting(
        6.0,
        "on flat structures a pixel is also hot when it exceeds its brightest neighbour by this many"
        " Poisson standard deviations (0: off)",
        low=0.0,
        high=100.0,
    )


def remove_hot_pixels(
    image, *, ratio: float = 5.0, min_excess: float = 50.0, flat_sigmas: float = 6.0
) -> StepResult:
    """Restore hot pixels of one channel from the median of their 8 neighbours.

    With ``v`` the pixel, ``m1`` the brightest of its 8 neighbours and ``m2`` the
    brightest of the 16 pixels two steps out, a pixel is hot when ``v - m1 >=
    min_excess`` and either

    * ``v > ratio * max(m1, 0)``, or
    * ``m1 - m2 <= s * sqrt(m1 + m2)`` (no peak of a small object around it) and
      ``v - m1 > s * sqrt(v + m1)`` (more than Poisson noise), ``s = flat_sigmas``.

    Detection uses the input only; then each detected pixel, and only those, is replaced
    by the median of its 8 neighbours: the low median (rank 3 of 0..7), so that a spike
    on the edge of a cell, with four cell and four background neighbours, is restored to
    background rather than given a cell value it never had. Image edges are mirrored (the
    edge pixel is not its own neighbour). Two adjacent bright pixels of similar value are never hot, so real
    specks of two or more pixels are left alone; a tiny Gaussian-ish speck (sigma >= 0.65
    px) has its peak at most ~2.6 times its brightest neighbour and falls off steeply
    beyond, so neither test touches it.

    Parameters
    ----------
    image : (Y, X) array_like or dask array
        One channel. Not modified.
    ratio : float, optional
        How many times the brightest neighbour a hot pixel exceeds (>= 1).
    min_excess : float, optional
        By how many counts at least a hot pixel exceeds its brightest neighbour (>= 0).
    flat_sigmas : float, optional
        Poisson standard deviations of the flat-structure test; 0 turns it off (the
        plain ratio rule).

    Returns
    -------
    StepResult
        ``image`` cleaned (float32), ``removed`` = input - output, ``stats`` with
        ``n_pixels`` (pixels restored) and ``removed_fraction`` (fraction of the
        channel's signal removed).

    References
    ----------
    .. [1] R. H. Chan, C.-W. Ho and M. Nikolova, IEEE Trans. Image Process. 14(10),
       2005 (two-phase detect-then-restore).

    Examples
    --------
    >>> import numpy as np
    >>> img = np.ones((5, 5), np.float32); img[2, 2] = 400.0
    >>> out, removed, st = remove_hot_pixels(img)
    >>> float(out[2, 2]), float(removed[2, 2]), st["n_pixels"]
    (1.0, 399.0, 1)
    """
    settings = build_settings(HotPixelSettings, {"ratio": ratio, "min_excess": min_excess,
                                                 "flat_sigmas": flat_sigmas}, section="hot_pixels")
    if is_dask(image):
        return _hot_pixels_dask(as_channel(image), settings)
    return _hot_pixels_numpy(as_channel(image), settings)


def _hot_pixels_numpy(image: np.ndarray, settings: HotPixelSettings, out=None, removed=None) -> StepResult:
    out, removed = kernel_outputs(image, out, removed)
    n = _k.hot_pixels(image, *_hot_parameters(settings), out, removed)
    return StepResult(out, removed, {"n_pixels": int(n), "removed_fraction": removed_fraction(removed, image)})


def _hot_parameters(settings: HotPixelSettings) -> tuple[float, float, float]:
    return float(settings.ratio), float(settings.min_excess), float(settings.flat_sigmas)


def _hot_pixels_block(block, parameters):
    out = np.empty(block.shape, np.float32)
    _k.hot_pixels(np.ascontiguousarray(block), *parameters, out, np.empty_like(out))
    return out


def _hot_pixels_dask(image, settings: HotPixelSettings) -> StepResult:
    out = lift_channel(image, _hot_pixels_block, hot_pixels_depth(settings), parameters=_hot_parameters(settings))
    removed = image - out
    stats = {"n_pixels": (removed > 0).sum(), "removed_fraction": removed_fraction(removed, image)}
    return StepResult(out, removed, stats)


def hot_pixels_depth(settings: HotPixelSettings) -> int:
    """Overlap that makes the chunked hot-pixel rule equal the whole-image rule (any settings)."""
    return HOT_PIXEL_DEPTH


def hot_pixels_stack(stack, settings: HotPixelSettings | Sequence[HotPixelSettings] | None = None) -> StepResult:
    """Hot-pixel step on a (C, Y, X) stack, numpy or dask.

    Parameters
    ----------
    stack : (C, Y, X) array_like or dask array
        Not modified.
    settings : HotPixelSettings or sequence of them, optional
        One for all channels, or one per channel. A channel whose settings have
        ``enabled=False`` passes through unchanged (zero removed map).

    Returns
    -------
    StepResult
        ``(cleaned, removed, stats)``: float32 stacks (numpy in -> numpy out, dask in ->
        dask out, same chunks) and one stats dict per channel (``enabled``, ``n_pixels``,
        ``removed_fraction``).

    Examples
    --------
    >>> import numpy as np
    >>> stack = np.zeros((2, 8, 8), np.float32); stack[:, 4, 4] = 300.0
    >>> off = HotPixelSettings(enabled=False)
    >>> cleaned, removed, st = hot_pixels_stack(stack, [HotPixelSettings(), off])
    >>> cleaned[:, 4, 4].tolist(), [s["n_pixels"] for s in st]
    ([0.0, 300.0], [1, 0])
    """
    stack = as_stack(stack)
    per_channel = per_channel_settings(settings, HotPixelSettings, stack.shape[0])

    def channel_step(c, image, s, out, removed):
        return _hot_pixels_numpy(image, s, out, removed)

    def block_kernel(c, s):
        return functools.partial(_hot_pixels_block, parameters=_hot_parameters(s)), hot_pixels_depth(s), {}

    return run_stack(stack, per_channel, channel_step, passive={"n_pixels": 0},
                     block_kernel=block_kernel, count_key="n_pixels")
