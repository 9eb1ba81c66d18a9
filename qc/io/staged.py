"""A stack in one uncompressed file beside an output, read and written in pieces.

The one way plexwash spills data to disk: the staged big-stack wash keeps its passes in
two of these (:mod:`plexwash.qc.staging`), and the OME-TIFF writer computes a big dask
stack into one before writing it band by band (:func:`plexwash.qc.io.tiff.write_ome_tiff`).
"""

from __future__ import annotations

import os
import threading
import weakref
from pathlib import Path

import numpy as np


class StagedStack:
    """A (C, Y, X) stack (float32 unless ``dtype`` says otherwise) in one uncompressed
    file, read and written in pieces.

    Reads and writes go through ``os.preadv``/``os.pwritev`` (no memory map, so the
    pages never count towards the process's memory), from any number of threads; two
    writers must not touch the same pixels.

    Supports ``stack[c]``, ``stack[c, y0:y1, x0:x1]`` and ``stack[c0:c1, y0:y1,
    x0:x1]`` for reading (what tile writers and ``dask.array.from_array`` ask for) and
    assignment of the same for ``dask.array.store``.
    """

    ndim = 3

    def __init__(self, path: str | Path, shape: tuple[int, int, int], *, dtype=np.float32):
        self.path = Path(path)
        self.shape = tuple(int(n) for n in shape)
        self.dtype = np.dtype(dtype)
        self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_TRUNC, 0o600)
        # closed by close(), or when the last task holding this stack lets go of it
        self._closer = weakref.finalize(self, os.close, self._fd)
        os.ftruncate(self._fd, int(np.prod(self.shape)) * self.dtype.itemsize)
        self._lock = threading.Lock() if not hasattr(os, "preadv") else None

    def close(self) -> None:
        """Close the file; only once no task can still read or write it."""
        self._closer()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- offsets
    def _offset(self, c: int, y: int, x: int = 0) -> int:
        _, n_y, n_x = self.shape
        return ((c * n_y + y) * n_x + x) * self.dtype.itemsize

    def _io(self, buffer: np.ndarray, offset: int, write: bool) -> None:
        view = memoryview(buffer).cast("B")
        done = 0
        while done < len(view):  # a call may move fewer bytes than asked
            part = view[done:]
            if self._lock is None:
                n = (os.pwritev if write else os.preadv)(self._fd, [part], offset + done)
            else:  # pragma: no cover - platforms without preadv (Windows)
                with self._lock:
                    os.lseek(self._fd, offset + done, os.SEEK_SET)
                    n = os.write(self._fd, part) if write else os.readv(self._fd, [part])
            if n <= 0:
                raise OSError(f"{self.path}: short {'write' if write else 'read'}")
            done += n

    # -- planes and bands
    def read_rows(self, channels, y0: int, y1: int) -> np.ndarray:
        """``stack[channels, y0:y1, :]`` as a new array (one read per channel)."""
        channels = list(channels)
        out = np.empty((len(channels), y1 - y0, self.shape[2]), self.dtype)
        for k, c in enumerate(channels):
            self._io(out[k], self._offset(c, y0), write=False)
        return out

    def write_rows(self, channels, y0: int, rows: np.ndarray) -> None:
        """Store ``rows`` (len(channels), n, X) at rows ``y0:y0+n`` of those channels."""
        rows = np.ascontiguousarray(rows, self.dtype)
        for k, c in enumerate(channels):
            self._io(rows[k], self._offset(c, y0), write=True)

    def read_plane(self, c: int) -> np.ndarray:
        return self.read_rows([c], 0, self.shape[1])[0]

    def write_plane(self, c: int, plane: np.ndarray) -> None:
        self.write_rows([c], 0, np.asarray(plane)[None])

    # -- array protocol (reading and ``dask.array.store``)
    def _region(self, key):
        if not isinstance(key, tuple):
            key = (key,)
        key = key + (slice(None),) * (3 - len(key))
        squeeze = isinstance(key[0], (int, np.integer))
        c = slice(int(key[0]), int(key[0]) + 1) if squeeze else key[0]
        bounds = [s.indices(n) for s, n in zip((c, key[1], key[2]), self.shape, strict=True)]
        if any(step != 1 for _, _, step in bounds):
            raise IndexError("StagedStack supports unit-step slices only")
        return [(start, max(start, stop)) for start, stop, _ in bounds], squeeze

    def __getitem__(self, key) -> np.ndarray:
        (c0, c1), (y0, y1), (x0, x1) = (region := self._region(key))[0]
        if x0 == 0 and x1 == self.shape[2]:
            out = self.read_rows(range(c0, c1), y0, y1)
        else:
            out = np.empty((c1 - c0, y1 - y0, x1 - x0), self.dtype)
            for k, c in enumerate(range(c0, c1)):
                for y in range(y0, y1):
                    self._io(out[k, y - y0], self._offset(c, y, x0), write=False)
        return out[0] if region[1] else out

    def __setitem__(self, key, value) -> None:
        (c0, c1), (y0, y1), (x0, x1) = self._region(key)[0]
        value = np.broadcast_to(np.asarray(value, self.dtype), (c1 - c0, y1 - y0, x1 - x0))
        if x0 == 0 and x1 == self.shape[2]:
            self.write_rows(range(c0, c1), y0, value)
            return
        for k, c in enumerate(range(c0, c1)):
            for y in range(y0, y1):
                self._io(np.ascontiguousarray(value[k, y - y0]), self._offset(c, y, x0), write=True)

    def __array__(self, dtype=None, copy=None):
        return self.read_rows(range(self.shape[0]), 0, self.shape[1]).astype(dtype or self.dtype,
                                                                             copy=False)
