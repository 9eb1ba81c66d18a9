"""Image helpers of the report: block-mean thumbnails, display ranges, greyscale PNGs.

Also the combined fraction of signal a chain of steps removed, shown on each thumbnail.
"""

from __future__ import annotations

import math
import struct
import zlib

import numpy as np

from .._arrays import is_dask

#: Longest side of a thumbnail, pixels.
THUMBNAIL_SIZE = 96
#: Robust contrast: these percentiles of the raw thumbnail map to black and white.
CONTRAST_PERCENTILES = (1.0, 99.5)


def downsample(stack, size: int = THUMBNAIL_SIZE) -> np.ndarray:
    """Block means of a (C, Y, X) stack so the longer side is at most ``size`` pixels.

    A dask stack is reduced chunk by chunk (``dask.array.coarsen``), so memory stays
    bounded; the edge rows / columns that do not fill a block are dropped.

    Examples
    --------
    >>> downsample(np.arange(16.0).reshape(1, 4, 4), 2)[0].tolist()
    [[2.5, 4.5], [10.5, 12.5]]
    """
    n_c, n_y, n_x = stack.shape
    factor = max(1, math.ceil(max(n_y, n_x) / size))
    ny, nx = (n_y // factor) * factor, (n_x // factor) * factor
    if is_dask(stack):
        import dask.array as da

        cropped = stack[:, :ny, :nx].astype(np.float64)
        return np.asarray(da.coarsen(np.mean, cropped, {1: factor, 2: factor}).compute())
    cropped = np.asarray(stack[:, :ny, :nx], dtype=np.float64)
    return cropped.reshape(n_c, ny // factor, factor, nx // factor, factor).mean(axis=(2, 4))


def combined_removed_fraction(fractions) -> float:
    """Fraction of a channel's raw signal that a chain of steps removed in all.

    Each step's fraction is relative to the signal entering it, so the remainder after
    all steps is the product of ``1 - f`` (missing steps count as 0).

    Examples
    --------
    >>> round(combined_removed_fraction([0.5, None, 0.5]), 6)
    0.75
    """
    kept = 1.0
    for f in fractions:
        kept *= 1.0 - (f or 0.0)
    return 1.0 - kept


def robust_range(image, percentiles=CONTRAST_PERCENTILES) -> tuple[float, float]:
    """Display range from two percentiles (robust to hot pixels); never empty.

    Examples
    --------
    >>> robust_range(np.arange(101.0), (0, 100))
    (0.0, 100.0)
    """
    lo, hi = (float(v) for v in np.percentile(np.asarray(image, float), percentiles))
    if hi <= lo:
        hi = lo + 1.0
    return lo, hi


def to_grey(image, lo: float, hi: float) -> np.ndarray:
    """Map ``lo .. hi`` linearly to 0 .. 255 (clipped), as uint8."""
    scaled = (np.asarray(image, float) - lo) / (hi - lo)
    return np.clip(np.round(255.0 * scaled), 0, 255).astype(np.uint8)


def png_grey(image) -> bytes:
    """Encode a 2-D uint8 array as an 8-bit greyscale PNG (no dependency beyond zlib).

    Each scanline uses the "Up" filter (difference to the row above), which suits smooth
    images (PNG specification, ISO/IEC 15948, filter type 2).

    Examples
    --------
    >>> png_grey(np.zeros((2, 3), np.uint8))[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    image = np.ascontiguousarray(image, dtype=np.uint8)
    if image.ndim != 2:
        raise ValueError("png_grey needs a 2-D array")
    h, w = image.shape
    up = image.astype(np.int16)
    up[1:] -= image[:-1]
    filtered = np.empty((h, w + 1), np.uint8)
    filtered[:, 0] = 2
    filtered[0, 0] = 0  # the first row has no row above: filter "None"
    filtered[:, 1:] = (up % 256).astype(np.uint8)
    filtered[0, 1:] = image[0]

    def chunk(kind: bytes, payload: bytes) -> bytes:
        return (struct.pack(">I", len(payload)) + kind + payload
                + struct.pack(">I", zlib.crc32(kind + payload) & 0xFFFFFFFF))

    header = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", zlib.compress(filtered.tobytes(), 9)) + chunk(b"IEND", b""))
