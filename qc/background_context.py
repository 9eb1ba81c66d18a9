"""The background context a wash shares between its steps, computed once per ROI.

:func:`roi_background` makes it from block sums (``CONTEXT_BLOCK`` x ``CONTEXT_BLOCK``
pixels) of the raw used channels, one plane at a time, so the in-memory, channel-subset and
staged washes make the same one from the same pixels (:class:`BackgroundContext`: the tissue
mask and the shared variation at full resolution, and a ``zone`` code per pixel that the
speckle step's tables are indexed by). The rules themselves (tissue mask, local rates, shared
variation) are in :mod:`.background`.
"""

from __future__ import annotations

import dataclasses
import functools

import numpy as np
from scipy import ndimage

from ._tail_search import search_kernels
from .background import BackgroundModel, BackgroundSettings, background_model, local_background

#: The default settings (frozen, so one instance serves every call).
_DEFAULTS = BackgroundSettings()

#: Edge in pixels of the blocks whose sums the ROI's background context is computed from.
CONTEXT_BLOCK = 4
#: Blocks on either side of the tissue edge that form the edge parts of the zones (the mask is
#: uncertain there and a window there mixes both regions; rates are fitted away from it).
EDGE_BLOCKS = 3
#: Steps of the shared variation per doubling in :attr:`BackgroundContext.zone`.
ZONE_STEPS_PER_DOUBLING = 16
#: Zone codes per part: variation from 2**-2 to 2**2 in ``1/16`` doublings (4.4 % apart).
ZONES_PER_PART = 64
#: Parts of an ROI: glass away from the tissue, glass at its edge, tissue at its edge, tissue.
PARTS = ("glass", "glass edge", "tissue edge", "tissue")


@dataclasses.dataclass(frozen=True)
class BackgroundContext:
    """The background model a wash computes once per ROI and hands to the steps that use it.

    Attributes
    ----------
    tissue : (Y, X) bool
        Where the tissue lies (:func:`tissue_mask` on block sums, blocks repeated).
    modulation : (Y, X) float32
        The variation of background shared by all channels, mean 1 per region.
    zone : (Y, X) uint8
        ``part * ZONES_PER_PART + k``: ``part`` indexes :data:`PARTS` (0, 1 glass; 2, 3
        tissue), ``k`` the variation rounded to ``1/16`` of a doubling around 1
        (``ZONES_PER_PART // 2``).
    model : BackgroundModel
        The model at block resolution (rates in counts per block).
    block : int
        Edge of the blocks, in pixels.
    """

    tissue: np.ndarray
    modulation: np.ndarray
    zone: np.ndarray
    model: BackgroundModel
    block: int

    @property
    def has_glass(self) -> bool:
        return not bool(self.tissue.all())


def zone_factors() -> np.ndarray:
    """(256,) float64: the shared variation each zone code stands for."""
    k = np.arange(len(PARTS) * ZONES_PER_PART) % ZONES_PER_PART - ZONES_PER_PART // 2
    return np.exp2(k / ZONE_STEPS_PER_DOUBLING)


def zone_parts(tissue: np.ndarray, edge: int = EDGE_BLOCKS) -> np.ndarray:
    """(Y, X) uint8 index into :data:`PARTS` of a (block resolution) tissue mask."""
    tissue = np.asarray(tissue, bool)
    structure = np.ones((3, 3), bool)
    near_glass = ndimage.binary_dilation(~tissue, structure, iterations=edge) if (~tissue).any() else \
        np.zeros(tissue.shape, bool)
    near_tissue = ndimage.binary_dilation(tissue, structure, iterations=edge) if tissue.any() else \
        np.zeros(tissue.shape, bool)
    return np.where(tissue, np.where(near_glass, 2, 3), np.where(near_tissue, 1, 0)).astype(np.uint8)


def block_sums(plane, block: int = CONTEXT_BLOCK) -> np.ndarray:
    """Sums of ``block`` x ``block`` pixel blocks of a (Y, X) plane, float64.

    Partial blocks at the far edges are scaled to a whole block's area (their mean times
    ``block**2``), so every block stands for the same area.
    """
    plane = np.asarray(plane)
    ny, nx = plane.shape
    by, bx = -(-ny // block), -(-nx // block)
    whole = _whole_block_sums(plane, block)
    if whole is not None:
        return whole * (block * block) / _block_area(ny, nx, block)
    # a slice of block rows at a time (each block's 16 values summed as over the whole
    # plane, so the same sums): a float64 copy of a few hundred rows, not of the plane
    step = max(1, BLOCK_SUM_ROWS // block)
    sums = np.empty((by, bx), np.float64)
    for b0 in range(0, by, step):
        b1 = min(b0 + step, by)
        rows = plane[b0 * block:min(b1 * block, ny)]
        padded = np.zeros(((b1 - b0) * block, bx * block), np.float64)
        padded[:rows.shape[0], :nx] = rows
        sums[b0:b1] = padded.reshape(b1 - b0, block, bx, block).sum(axis=(1, 3))
    return sums * (block * block) / _block_area(ny, nx, block)


def _whole_block_sums(plane: np.ndarray, block: int) -> np.ndarray | None:
    """The block sums of a plane of whole counts (every value a whole number of magnitude at most
    2**40) by one compiled pass (``steps._search_kernels.whole_block_sums``), or None for any
    other plane. Whole numbers that small add exactly in float64 in any order, so these are the
    sums numpy's reduction makes."""
    if plane.dtype.kind not in "fiu" or plane.ndim != 2 or plane.size == 0 or block * block > 4096:
        return None
    ny, nx = plane.shape
    sums = np.empty((-(-ny // block), -(-nx // block)), np.float64)
    return sums if search_kernels().whole_block_sums(plane, int(block), sums) else None


#: Pixel rows per slice of :func:`block_sums` (256 rows of 2400 pixels: 5 MiB of float64).
BLOCK_SUM_ROWS = 256


@functools.lru_cache(maxsize=8)
def _block_area(ny: int, nx: int, block: int) -> np.ndarray:
    """Pixels of a ``ny`` x ``nx`` plane in each block (the same for every plane: made once)."""
    by, bx = -(-ny // block), -(-nx // block)
    covered = np.zeros((by * block, bx * block), np.float64)
    covered[:ny, :nx] = 1.0
    area = covered.reshape(by, block, bx, block).sum(axis=(1, 3))
    area.flags.writeable = False
    return area


def block_settings(settings: BackgroundSettings, block: int) -> BackgroundSettings:
    """``settings`` restated for block sums of ``block`` x ``block`` pixels."""
    def odd(value):
        return max(3, int(round(value / block)) | 1)

    return dataclasses.replace(
        settings, smoothing_sigma=settings.smoothing_sigma / block,
        glass_rate=settings.glass_rate * block * block,
        min_area=int(round(settings.min_area / (block * block))),
        spike_excess=settings.spike_excess, test_box=max(1, int(round(settings.test_box / block))),
        window=odd(settings.window), scale_window=odd(settings.scale_window),
        prior_pixels=settings.prior_pixels / (block * block), floor=settings.floor * block * block)


def roi_background(plane, channels, shape, *, block: int = CONTEXT_BLOCK,
                   settings: BackgroundSettings = _DEFAULTS) -> BackgroundContext:
    """The background context of one ROI, from the block sums of its used channels.

    ``plane(i)`` returns channel ``i``'s raw (Y, X) counts; ``channels`` lists the used
    channels; ``shape`` is the ROI's (Y, X). Each plane is read once and reduced to its
    block sums, so the cost is one pass over the used channels and the memory a few
    planes. The result depends only on those pixels (deterministic).

    Examples
    --------
    >>> rng = np.random.default_rng(4)
    >>> rate = np.full((160, 160), 0.01); rate[:, 64:] = 0.12
    >>> stack = rng.poisson(np.broadcast_to(rate, (6, 160, 160))).astype(np.float32)
    >>> context = roi_background(stack.__getitem__, range(6), (160, 160))
    >>> bool(context.tissue[:, 70:].all()), bool(context.tissue[:, :56].any())
    (True, False)
    """
    channels = list(channels)
    ny, nx = (int(n) for n in shape)
    if not channels:
        blocks = np.zeros((1, -(-ny // block), -(-nx // block)))
    else:
        blocks = np.stack([block_sums(plane(i), block) for i in channels])
    return context_of_block_sums(blocks, (ny, nx), block=block, settings=settings)


def _full(coarse: np.ndarray, block: int, shape) -> np.ndarray:
    """A block-resolution map repeated back to pixels (cut to ``shape``)."""
    full = np.repeat(np.repeat(coarse, block, axis=0), block, axis=1)
    return np.ascontiguousarray(full[:shape[0], :shape[1]])


def region_levels(plane, context: BackgroundContext,
                  settings: BackgroundSettings = _DEFAULTS) -> np.ndarray:
    """One channel's mean background on glass and in tissue, counts per pixel, ``(2,)``.

    From the block sums of ``plane`` (the counts a step cleans) with the context's mask and
    shared variation (:func:`local_background`: likely signal left out, the scale matched
    on the lower tail of box counts). NaN for a region the ROI does not have.
    """
    block = context.block
    blocks = block_sums(plane, block)
    _, regions = local_background(blocks, mask=context.model.tissue, modulation=context.model.modulation,
                                  settings=block_settings(settings, block), return_regions=True)
    if context.model.tissue.all():
        regions[0] = np.nan
    return regions / float(block * block)


def context_of_block_sums(blocks, shape, *, block: int = CONTEXT_BLOCK,
                          settings: BackgroundSettings = _DEFAULTS,
                          rates_out=None, empty=None) -> BackgroundContext:
    """:func:`roi_background` from block sums already made, so a pass that reads the raw
    planes for another reason can reduce them on the way (the staged wash's first pass).

    ``blocks`` is (C, by, bx): :func:`block_sums` of each used channel's raw plane with
    ``block``, in the order of the used channels; ``shape`` the ROI's (Y, X). The same
    sums give the same context as :func:`roi_background` on those planes. ``rates_out``
    (float32, the shape of ``blocks``) holds the model's rates (:func:`background_model`).
    ``empty(name, shape, dtype)``, when given, makes the arrays that hold the pixel-size
    maps (``"tissue"``, ``"modulation"``, ``"zone"``; e.g. memory maps in a staging folder),
    filled with the same values.
    """
    ny, nx = (int(n) for n in shape)
    model = background_model(np.asarray(blocks), settings=block_settings(settings, block), rates_out=rates_out)

    def kept(name, full):
        if empty is None:
            return full
        out = empty(name, full.shape, full.dtype)
        out[...] = full
        return out

    tissue = kept("tissue", _full(model.tissue, block, (ny, nx)))
    modulation = kept("modulation", _full(model.modulation, block, (ny, nx)).astype(np.float32))
    steps = np.rint(np.log2(np.maximum(model.modulation, 1e-6)) * ZONE_STEPS_PER_DOUBLING)
    k = np.clip(steps + ZONES_PER_PART // 2, 0, ZONES_PER_PART - 1)
    zone = kept("zone", _full((zone_parts(model.tissue) * ZONES_PER_PART + k).astype(np.uint8), block, (ny, nx)))
    return BackgroundContext(tissue=tissue, modulation=modulation, zone=zone, model=model,
                             block=block)
