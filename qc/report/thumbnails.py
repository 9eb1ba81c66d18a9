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
    out = np.empty((n_c, ny // factor, nx // factor))
    for c in range(n_c):
        out[c] = block_mean(stack[c], factor)
    return out


def block_mean(plane, factor: int) -> np.ndarray:
    """Means of the ``factor`` x ``factor`` blocks of a 2-D image, float64 (edge rows and
    columns that do not fill a block dropped).

    Rows are summed first, whole rows at a time in float64 (no float64 copy of the
    plane), then the columns of the ``factor`` times smaller result.

    Examples
    --------
    >>> block_mean(np.arange(16, dtype=np.uint8).reshape(4, 4), 2).tolist()
    [[2.5, 4.5], [10.5, 12.5]]
    """
    plane = np.asarray(plane)
    ny, nx = (plane.shape[0] // factor) * factor, (plane.shape[1] // factor) * factor
    rows = np.add.reduce(plane[:ny, :nx].reshape(ny // factor, factor, nx), axis=1, dtype=np.float64)
    return rows.reshape(ny // factor, nx // factor, factor).sum(axis=2) / (factor * factor)


def read_thumbnail(path, size: int = THUMBNAIL_SIZE) -> np.ndarray | None:
    """:func:`downsample` of a TIFF stack's level 0, read one channel plane at a time.

    Read with tifffile alone: no task graph, no copy of the whole stack, so a report pays
    little more than the decoding. Only for a first series laid out (C, Y, X) or (Y, X);
    None otherwise, or when the thumbnail is not finite (callers then read the file
    through :func:`plexwash.qc.io.read_roi`, which says what is wrong with it).
    """
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            series = tif.series[0]
            axes, shape = series.axes.upper(), tuple(series.shape)
            if axes not in ("CYX", "YX") or series.dtype.kind not in "uif":
                return None
            n_y, n_x = shape[-2:]
            pages = list(series.pages)
            if len(pages) != (shape[0] if axes == "CYX" else 1) or min(n_y, n_x) < 1:
                return None
            factor = max(1, math.ceil(max(n_y, n_x) / size))
            planes = []
            for page in pages:
                plane = page.asarray()
                if plane.shape != (n_y, n_x):
                    return None
                planes.append(block_mean(plane, factor))
    except Exception:  # any reading problem: the caller's reader reports it properly
        return None
    thumbnail = np.stack(planes)
    return thumbnail if np.isfinite(thumbnail).all() else None


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

    The scanlines are filtered "None" or "Up" (difference to the row above; PNG
    specification, ISO/IEC 15948, filter types 0 and 2), whichever a quick trial
    compression finds smaller: "Up" suits smooth images, "None" noisy ones.

    Examples
    --------
    >>> png_grey(np.zeros((2, 3), np.uint8))[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    image = np.ascontiguousarray(image, dtype=np.uint8)
    if image.ndim != 2:
        raise ValueError("png_grey needs a 2-D array")
    return _png(image, colour_type=0)


def png_rgb(image) -> bytes:
    """Encode a (H, W, 3) uint8 array as an 8-bit RGB PNG (colour type 2), filtered as
    :func:`png_grey` does.

    Examples
    --------
    >>> png_rgb(np.zeros((2, 3, 3), np.uint8))[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    image = np.ascontiguousarray(image, dtype=np.uint8)
    if image.ndim != 3 or image.shape[2] != 3:
        raise ValueError("png_rgb needs an (H, W, 3) array")
    return _png(image, colour_type=2)


def _png(image: np.ndarray, *, colour_type: int) -> bytes:
    """PNG bytes of a uint8 (H, W) or (H, W, 3) array: IHDR, one IDAT, IEND.

    Every scanline gets the same filter, "None" or "Up", whichever compresses smaller.
    zlib level 1: a few percent larger than level 9 on these images, many times faster
    (a 500-ROI report has a sprite of every channel and a heatmap of every page).
    """
    h, w = image.shape[:2]
    rows = image.reshape(h, -1)
    plain = np.empty((h, rows.shape[1] + 1), np.uint8)
    plain[:, 0] = 0
    plain[:, 1:] = rows
    up = plain.copy()
    up[1:, 0] = 2  # the first row has no row above: it stays "None"
    up[1:, 1:] = rows[1:] - rows[:-1]  # uint8 arithmetic wraps modulo 256, as the filter wants
    data = min((zlib.compress(f.tobytes(), 1) for f in (plain, up)), key=len)

    def chunk(kind: bytes, payload: bytes) -> bytes:
        return (struct.pack(">I", len(payload)) + kind + payload
                + struct.pack(">I", zlib.crc32(kind + payload) & 0xFFFFFFFF))

    header = struct.pack(">IIBBBBB", w, h, 8, colour_type, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", data) + chunk(b"IEND", b""))
