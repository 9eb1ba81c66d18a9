"""The ghost-aware ``empty`` test of one channel: background by region plus plausible ghosts.

A channel is explained, bin by bin, as background plus spillover ghosts of the other
channels (:func:`plexwash.qc.quality.excess.fit_model`), and judged ``empty`` when nothing
is left over that covers ``min_area`` pixels. What the model may use:

- **background**: one rate per pixel, or, when the ROI has glass (:mod:`.regions`), one
  rate on glass and one in the tissue: tissue background is several times the glass's,
  and a single rate would leave the tissue's surplus as excess;
- **ghosts, with a known spillover matrix** (given, or estimated and passed in): the
  pattern of the matrix's column, with one fitted scale (0 to 2);
- **ghosts, without a matrix**: each other channel at up to ``max_ghost`` of its counts,
  but only the channels that can physically spill into this one when the names carry
  masses (M +/- 1, other isotopes of the same element, M + 16 oxides;
  :func:`plexwash.qc.spillover.plausible_pairs`). A dim stain that shares its cells with
  a bright stain of an unrelated mass is not explained away as that stain's ghost.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..spillover.masses import plausible_pairs
from .channel import ChannelQuality, channel_flags
from .excess import WideDesign, combine_rows, fit_model, measure_excess_area
from .settings import QualitySettings

# Largest factor on the ghost pattern of a known spillover matrix.
KNOWN_SCALE_MAX = 2.0


# Slopes below this are not listed as ghost sources in reports.
REPORTED_SLOPE = 1e-3


@dataclasses.dataclass(frozen=True)
class GhostModel:
    """What every channel's empty test of one ROI shares.

    ``design`` holds ``n_background`` rows of pixels per bin (one per region), then every
    channel's bin sums (data units); ``gram`` is ``design @ design.T``; ``shape`` the bin
    grid's; ``names`` the channel names; ``matrix`` the known spillover matrix or None.
    """

    design: np.ndarray
    gram: np.ndarray
    n_background: int
    shape: tuple
    names: list
    matrix: np.ndarray | None
    wide: WideDesign | None = None

    def sources(self, settings: QualitySettings) -> np.ndarray:
        """(C, C) bool: channel i may be fitted as a ghost in channel j."""
        return plausible_pairs(self.names, all_pairs=not settings.plausible_ghosts)


def ghost_test(c: int, cq: ChannelQuality, model: GhostModel, settings: QualitySettings,
               sources: np.ndarray | None) -> ChannelQuality:
    """Excess test of channel c with the region backgrounds and the other channels' ghosts.

    ``sources`` is :meth:`GhostModel.sources`; unused (may be None) with a known matrix.
    """
    k, design, names, wide = model.n_background, model.design, model.names, model.wide
    target = design[k + c].astype(np.float64) if wide is None else wide.whole[k + c]
    others = [i for i in range(len(names)) if i != c]
    if model.matrix is not None:
        # The known matrix fixes the ghost pattern; its overall scale is fitted
        # (0 .. KNOWN_SCALE_MAX): measured sources carry their own background and
        # spillover, so the pattern is a little off in scale, never in shape.
        weights = np.array(model.matrix[:, c], dtype=np.float64)
        weights[c] = 0.0  # a channel is no ghost of itself (no copy of the other rows)
        ghost = combine_rows(weights, design[k:])
        rows = np.vstack([design[:k].astype(np.float64), ghost])
        upper = np.r_[np.full(k, np.inf), KNOWN_SCALE_MAX]
        mu, coef, _ = fit_model(target, rows, upper, settings, n_background=k)
        slopes = model.matrix[others, c] * coef[k]
    else:
        upper = np.zeros(design.shape[0])
        upper[:k] = np.inf
        if settings.ghosts:
            allowed = sources[:, c].copy()
            allowed[c] = False  # a channel is no ghost of itself
            upper[k:][allowed] = settings.max_ghost
        mu, coef, _ = fit_model(target, design, upper, settings, gram=model.gram,
                                cross=model.gram[:, k + c], n_background=k, wide=wide)
        slopes = coef[[k + i for i in others]]
    area = (design[:k].astype(np.float64) if wide is None else wide.whole[:k]).sum(axis=0)
    area = area.reshape(model.shape)
    excess_area = measure_excess_area(target.reshape(model.shape) * settings.counts_per_unit,
                                      mu.reshape(model.shape), area, settings)
    listed = (np.asarray(slopes) >= REPORTED_SLOPE).nonzero()[0].tolist()  # few of the C - 1
    ghost_sources = tuple(sorted(((names[others[j]], float(slopes[j])) for j in listed),
                                 key=lambda p: -p[1]))
    flags = channel_flags(excess_area, cq.sbr, cq.saturated_fraction, settings)
    # the rate reported is the tissue's (the last background row) when the ROI has glass
    return dataclasses.replace(cq, excess_area=excess_area, flags=flags,
                               background_rate=float(coef[k - 1]), ghost_sources=ghost_sources)
