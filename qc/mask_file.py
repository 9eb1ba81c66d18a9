"""The tissue mask written with a ROI's outputs: ``<roi>.mask.ome.tiff``.

One channel named ``tissue``, uint8, 1 on tissue and 0 on glass: the mask of the ROI's
background context (:func:`plexwash.qc.background_context.roi_background`, the same one the
wash's speckle step tests against), so the next step (segmentation, the studio, a
notebook) sees where the engine found tissue. Written atomically through the output guard
(never over an input, nor over a file plexwash did not write), as a pyramidal OME-TIFF
whatever the washed stacks' format. A run writes it beside each washed stack when the
recipe's ``[output] tissue_mask`` is on (off by default: a run folder then holds exactly the
files it held before).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from ._arrays import channel_plane, used_channels
from .background_context import roi_background
from .files import check_output
from .io import write_stack
from .io.cohort import roi_stem

__all__ = ["MASK_CHANNEL", "MASK_SUFFIX", "mask_path", "tissue_mask_of", "write_tissue_mask"]

#: File name ending of a tissue mask (after the ROI's stem).
MASK_SUFFIX = ".mask.ome.tiff"
#: Name of the mask's one channel.
MASK_CHANNEL = "tissue"


def mask_path(output: str | Path) -> Path:
    """Where the tissue mask of the washed stack ``output`` goes (same folder and stem).

    Examples
    --------
    >>> mask_path("out/slide1/roi_01.ome.tiff").as_posix()
    'out/slide1/roi_01.mask.ome.tiff'
    """
    output = Path(output)
    return output.parent / (roi_stem(output) + MASK_SUFFIX)


def tissue_mask_of(roi) -> np.ndarray:
    """(Y, X) bool: the tissue mask of an ROI's background context (raw used channels)."""
    used = used_channels(roi.use)
    shape = tuple(int(n) for n in roi.data.shape[1:])
    context = roi_background(lambda i: channel_plane(roi.data, i, dtype=np.float32), used, shape)
    return context.tissue


def write_tissue_mask(roi, path: str | Path, recipe=None, *, inputs=(), provenance=None) -> Path:
    """Write ``roi``'s tissue mask to ``path`` (an OME-TIFF), atomically; return the path.

    Parameters
    ----------
    roi : Roi
        From :func:`plexwash.qc.read_roi`.
    path : str or Path
        Destination, ending in ``.ome.tiff`` (see :func:`mask_path`).
    recipe : Recipe, optional
        Its ``[output]`` compression and tile size are used (the format is always OME-TIFF).
    inputs : iterable of path
        The command's inputs: the mask is never written over, into or as one of them.
    provenance : mapping, optional
        Written into the file's metadata.

    Examples
    --------
    >>> import tempfile
    >>> from plexwash.qc.io import Roi, read_roi
    >>> rng = np.random.default_rng(0)
    >>> rate = np.full((96, 96), 0.01); rate[:, 40:] = 0.15
    >>> stack = rng.poisson(np.broadcast_to(rate, (4, 96, 96))).astype(np.float32)
    >>> roi = Roi(stack, ("A", "B", "C", "D"), Path("roi.ome.tiff"))
    >>> out = write_tissue_mask(roi, Path(tempfile.mkdtemp()) / "roi.mask.ome.tiff")
    >>> mask = read_roi(out)
    >>> mask.channels, np.asarray(mask.data).dtype.name, int(np.asarray(mask.data)[0, :, 60:].min())
    (('tissue',), 'uint8', 1)
    """
    from .io.cohort import OutputSettings

    path = check_output(path, [roi.path, *inputs], kind="stack")
    settings = recipe.output if recipe is not None else OutputSettings()
    settings = dataclasses.replace(settings, format="ome-tiff")
    data = tissue_mask_of(roi).astype(np.uint8)[None]
    return write_stack(path, data, [MASK_CHANNEL], pixel_size=roi.pixel_size, settings=settings,
                       labels=[MASK_CHANNEL], provenance=provenance)
