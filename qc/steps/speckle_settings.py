"""Settings of the speckle step (recipe section ``[speckle]``), declared once for the registry,
and the chunk overlap they imply (:func:`speckle_depth`)."""

from __future__ import annotations

import dataclasses

from ..settings import setting


@dataclasses.dataclass(frozen=True)
class SpeckleSettings:
    """Speckle step settings (recipe section ``[speckle]``)."""

    enabled: bool = setting(True, "remove isolated background counts by a local-density test")
    threshold: float = setting(
        0.5,
        "a pixel is positive when its value is above this (0.5: a whole count; ignores sub-count residue"
        " left by compensation)",
        low=0.0,
        high=1e6,
    )
    radius: int = setting(2, "half-width of the square window in which positive neighbours are counted", low=1, high=50)
    alpha: float = setting(
        0.01, "keep a pixel when its neighbour count is this improbable for background", low=0.0, high=0.5, low_open=True
    )
    value_alpha: float = setting(
        1e-6, "keep a pixel when its own value is this improbable for background", low=0.0, high=0.5, low_open=True
    )
    keep_touching: bool = setting(
        False, "also keep positive pixels touching a dense pixel (more of thin processes, more background beside cells)"
    )
    min_area: int = setting(2, "drop kept groups of fewer pixels (8-connected)", low=1, high=100)
    lone_alpha: float = setting(
        1e-12, "a kept group smaller than min_area stays when one of its pixels is this improbable for the"
        " local background (a one-pixel speck of real stain; about value_alpha over a million pixels,"
        " Bonferroni; 0: off)", low=0.0, high=0.5,
    )
    wide_radius: int = setting(
        5, "half-width of a wider window: a pixel is also kept when it is dense there (alpha) and at least"
        " mildly dense in its own window (support_alpha); keeps dim diffuse stains and thin fibres (0: off)",
        low=0, high=50,
    )
    line_half: int = setting(
        4, "half-length of the line windows (16 orientations and their phases): a pixel is also kept when"
        " the summed counts of the dim positive pixels on a line through it are improbably high (Poisson test,"
        " line_alpha over all lines, Bonferroni); keeps thin fibres (0: off)",
        low=0, high=50,
    )
    line_alpha: float = setting(
        0.003, "false-keep rate of the line test for one background pixel, shared by all its lines", low=0.0,
        high=0.5, low_open=True,
    )
    line_side_alpha: float = setting(
        0.05, "each half of such a line must hold counts this improbable for background on its own (a"
        " background pixel beside a cell or past a fibre's end has a half of background; 1: off)",
        low=0.0, high=1.0, low_open=True,
    )
    flank_alpha: float = setting(
        0.01, "such a line must also be this improbably denser than each parallel line flank_distance pixels"
        " to either side (conditional test of two Poisson means): a fibre is, a line along a cell's edge or"
        " across two cells is not (0: off)", low=0.0, high=0.5,
    )
    line_max_level: float = setting(
        1.0, "the line test is asked only where the background is at most this many counts per pixel (on a"
        " denser background nearly every pixel is positive and the square windows alone judge it: the line"
        " test would cost a scan of every line of every pixel)", low=0.0, high=1e6,
    )
    line_extend: int = setting(
        2, "a dropped dim pixel is kept when it continues a kept line: its own count passes the side test"
        " (line_side_alpha), one or two of its 8 neighbours are kept, its neighbour on one half of a line"
        " through it is kept, and the line passes the line test with the side test asked of that half alone"
        " (a fibre's end, whose other half lies past the fibre); this many rounds, one pixel each (0: off)",
        low=0, high=20,
    )
    flank_distance: int = setting(
        2, "distance in pixels, across the line, of the two parallel lines the flank test compares with",
        low=1, high=20,
    )
    area_alpha: float = setting(
        1e-6, "a dropped dim pixel is kept when its wide window (wide_radius) holds this improbably many dim"
        " positive neighbours for background (exact binomial test) and each half of the window does too at"
        " area_half_alpha: inside a dim diffuse stain, not beside it (0: off)", low=0.0, high=0.5,
    )
    area_half_alpha: float = setting(
        0.01, "each half of the wide window (above, below, left, right of the pixel) must hold this improbably"
        " many dim positive pixels for the area rule (an intersection-union test: stricter only)",
        low=0.0, high=1.0, low_open=True,
    )
    support_alpha: float = setting(
        0.2, "how improbable for background the own window's count must be for the wider window to count",
        low=0.0, high=1.0, low_open=True,
    )
    residue_alpha: float = setting(
        0.1, "after compensation, counts left where the removed spillover is at least the local background are"
        " kept only when their 3 x 3 window is this improbable under Poisson(spillover + background) (0: off)",
        low=0.0, high=0.5,
    )
    edge_alpha: float = setting(
        1e-3, "a dense pixel is not kept by density when its value is this improbably low for the mean of its"
        " 8 neighbours (background on the rim of bright cells; 0: off)", low=0.0, high=0.5
    )
    rim_alpha: float = setting(
        0.01, "a dense pixel beside a bright cell (some, but under half, of its window's neighbours bright) is"
        " kept by density only when its other neighbours alone are this improbable for background (exact"
        " binomial test; removes background on the rims of cells; 0: off)", low=0.0, high=0.5,
    )
    chain_alpha: float = setting(
        1e-4, "dropped positive pixels forming an 8-connected group of 2 to chain_max pixels are kept when"
        " their summed counts are this improbable for background (exact tail of a sum of zero-truncated"
        " Poisson counts, David & Johnson 1952): a dim fibre that bends, in low background (0: off)",
        low=0.0, high=0.5,
    )
    chain_max: int = setting(
        16, "largest group of dropped pixels the chain rule judges (a larger group is a dense area, judged"
        " by the windows); the chunk overlap grows by this many pixels", low=0, high=64,
    )
    chain_contacts: int = setting(
        6, "... and only when the group touches at most this many kept pixels (8-connected): a chain meets"
        " kept pieces at its ends, a group along the rim of a kept cell touches it all along, where the counts"
        " are not background's alone", low=0, high=10**6,
    )
    local_rates: bool = setting(
        True, "test against the background where the pixel lies (tissue or glass, and its local variation)"
        " rather than one rate for the whole channel"
    )


def speckle_depth(settings: SpeckleSettings) -> int:
    """Overlap that makes the chunked speckle filter equal the whole-image filter.

    The largest of ``radius``, ``wide_radius`` and ``line_half`` (plus ``flank_distance`` with the flank test)
    for the window and line counts, 1 for the neighbour
    mean and the ``keep_touching`` rule, ``min_area - 1`` for the component-size rule (see the
    module notes), one pixel per round of the line-end rule (``line_extend``: a round reads
    the kept marks of the pixels next to it), and ``chain_max`` for the chain rule (a group it
    judges spans fewer pixels; a larger group shows more than ``chain_max`` pixels within that
    distance, so a block sees it is too large).

    Examples
    --------
    >>> speckle_depth(SpeckleSettings(radius=2, wide_radius=0, line_half=0, min_area=2))
    4
    >>> speckle_depth(SpeckleSettings(radius=2, wide_radius=5, line_half=4, flank_distance=2, min_area=2,
    ...                               line_extend=2, chain_alpha=0))
    10
    >>> speckle_depth(SpeckleSettings())
    26
    """
    extend = int(settings.line_extend) if int(settings.line_half) > 0 else 0
    chains = int(settings.chain_max) if settings.chain_alpha > 0 and int(settings.chain_max) >= 2 else 0
    return (max(int(settings.radius), int(settings.wide_radius), _line_reach(settings)) + 1
            + max(int(settings.min_area) - 1, 0) + extend + chains)


def _line_reach(settings: SpeckleSettings) -> int:
    """How far from a pixel the line test reads: the line, and its flanks moved across it."""
    half = int(settings.line_half)
    if half <= 0:
        return 0
    return half + (int(settings.flank_distance) if settings.flank_alpha > 0 else 0)
