"""Compensation: per pixel, the non-negative true signal that best explains the counts.

:func:`compensate` checks the matrix, splits the channels into the connected components
of the spillover graph, prepares each component's solver data (sparse rows, inverse,
normal equations) and runs the compiled kernels of
:mod:`plexwash.qc.spillover._nnls` on numpy or dask stacks.
"""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
from plexwash.qc.spillover import _nnls  # absolute: one numba cache, whatever imported us

from .._arrays import is_dask
from ..errors import InputError
from .matrix import SpilloverMatrix, check_values

#: Projected Gauss-Seidel is used when the Jacobi contraction factor is below this
#: (the sweeps then gain at least one bit per pass); otherwise block principal pivoting.
_CONTRACTION_LIMIT = 0.5
#: Sweeps stop when no value changes by more than this fraction of the pixel's largest
#: count; the error left is at most that times rho / (1 - rho) < 1, far below float32
#: rounding of the output (6e-8). About 7 sweeps on mass-tagged panels.
_SWEEP_TOLERANCE = 1e-10
_MAX_EXCHANGES = 200


def compensate(stack, spillover, *, method: str = "nnls"):
    """Compensate spillover: per pixel, the non-negative ``x`` with ``S^T x`` closest to ``y``.

    ``method="nnls"`` solves ``min ||S^T x - y||_2`` subject to ``x >= 0`` exactly for
    every pixel (the reference is ``scipy.optimize.nnls``; results agree to rounding).
    ``method="linear"`` solves ``S^T x = y`` and clips negative values to 0 (faster,
    not a least-squares solution).

    How (details in :mod:`plexwash.qc.spillover._nnls`): channels split into the connected
    components of the spillover graph, solved separately (a channel that takes part in
    no spillover is just clipped at 0). A near-identity matrix makes the projected
    Gauss–Seidel map on the normal equations a max-norm contraction, so sweeps over a
    block of pixels, vectorised across pixels and following the sparse pattern of
    ``S S^T``, converge to the exact solution; they stop once no value moves by more
    than 1e-10 of the pixel's largest count, which leaves an error far below float32
    rounding (6e-8). Other matrices (strong spillover) use block principal pivoting per
    pixel, with Lawson–Hanson as the last resort.

    Parameters
    ----------
    stack : (C, Y, X) numpy.ndarray or dask.array.Array
        Counts. Not modified. A dask stack may be chunked in Y and X; it is rechunked
        to hold all channels in one chunk where needed.
    spillover : (C, C) array_like or SpilloverMatrix
        In the stack's channel order (see :func:`align_spillover`).
    method : {"nnls", "linear"}

    Returns
    -------
    numpy.ndarray or dask.array.Array
        float32, same shape; numpy in -> numpy out, dask in -> dask out.

    References
    ----------
    .. [1] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*, Prentice-Hall,
       1974, ch. 23.
    .. [2] V. Franc, V. Hlavac and M. Navara, "Sequential coordinate-wise algorithm for
       the non-negative least squares problem", CAIP 2005, LNCS 3691, 407-414.
    .. [3] D. P. Bertsekas and J. N. Tsitsiklis, *Parallel and Distributed Computation:
       Numerical Methods*, Prentice-Hall, 1989, sec. 3.1.
    .. [4] J. Kim and H. Park, "Fast nonnegative matrix factorization: an active-set-like
       method and comparisons", SIAM J. Sci. Comput. 33(6), 2011.

    Examples
    --------
    >>> import numpy as np
    >>> s = np.array([[1.0, 0.1], [0.0, 1.0]])
    >>> y = np.array([[[10.0]], [[0.0]]])        # channel 2 got nothing: 1.0 would be spill
    >>> [round(float(v), 3) for v in compensate(y, s)[:, 0, 0]]
    [9.901, 0.0]
    """
    if method not in ("nnls", "linear"):
        raise InputError("method", f"unknown compensation method {method!r} (nnls or linear)")
    array = stack if is_dask(stack) else np.asarray(stack)
    if array.ndim != 3:
        raise InputError("stack", f"expected a C x Y x X stack, got {array.ndim}-D data")
    values = _spillover_values(spillover, array)
    if is_dask(array):
        return _compensate_dask(array, values, method)
    return compensate_array(array, values, method=method, parallel=True)


def _spillover_values(spillover, stack) -> np.ndarray:
    n_channels = int(stack.shape[0])
    if isinstance(spillover, SpilloverMatrix):
        values, names = spillover.values, spillover.channels
    else:
        values = np.asarray(spillover, dtype=np.float64)
        names = tuple(f"channel {k}" for k in range(values.shape[0] if values.ndim == 2 else 0))
    if values.ndim == 2 and values.shape[0] == values.shape[1] and values.shape[0] != n_channels:
        raise InputError("spillover", f"matrix is {values.shape[0]} x {values.shape[0]} but the stack has {n_channels} channels")
    check_values(values, names, "spillover")
    return np.array(values, dtype=np.float64)


def _compensate_dask(stack, values: np.ndarray, method: str):
    import dask.array as da
    from dask.base import tokenize

    if len(stack.chunks[0]) > 1:
        stack = stack.rechunk({0: -1})
    name = "compensate-" + tokenize(stack, values, method)
    return da.map_blocks(
        _compensate_block, stack, values, method,
        dtype=np.float32, name=name, meta=np.empty((0, 0, 0), np.float32),
    )


def _compensate_block(block, values, method):
    # dask runs blocks on its own threads: the serial kernel avoids oversubscription.
    return compensate_array(np.asarray(block), values, method=method, parallel=False)


@dataclasses.dataclass(frozen=True)
class _Component:
    """One connected component of the spillover graph, ready for the kernels."""

    idx: np.ndarray
    mode: int
    arrays: tuple
    max_sweeps: int


@functools.lru_cache(maxsize=16)
def _components_cached(key: bytes, n: int) -> tuple[_Component, ...]:
    return _prepare_components(np.frombuffer(key, dtype=np.float64).reshape(n, n))


def _prepare_components(values: np.ndarray) -> tuple[_Component, ...]:
    """Split the matrix into connected components and precompute each one's solver data."""
    from scipy.sparse.csgraph import connected_components

    n = values.shape[0]
    linked = (values != 0) & ~np.eye(n, dtype=bool)
    _count, labels = connected_components(linked | linked.T, directed=False)
    components = []
    for label in np.unique(labels):
        idx = np.flatnonzero(labels == label).astype(np.int64)
        if idx.size == 1:
            components.append(_Component(idx, -1, (), 0))
            continue
        idx = idx[_colour_order(linked[np.ix_(idx, idx)] | linked[np.ix_(idx, idx)].T)]
        s = values[np.ix_(idx, idx)]
        a = s.T
        ainv = np.linalg.inv(a)
        g = s @ s.T  # A^T A
        h = ainv @ ainv.T  # G^-1
        g_off = g - np.diag(np.diag(g))
        rho = float(np.max(np.abs(g_off).sum(axis=1) / np.diag(g)))
        mode = _nnls.MODE_SWEEP if rho < _CONTRACTION_LIMIT else _nnls.MODE_PIVOT
        # Enough sweeps for the contraction to shrink any start error below tolerance;
        # a pixel that still moves after that goes to the pivoting solver.
        max_sweeps = int(min(1000, math.ceil(math.log(_SWEEP_TOLERANCE * 1e-3) / math.log(max(rho, 1e-3)))) + 20)
        arrays = (
            *_csr(s), *_csr((s - np.eye(idx.size)).T), *_csr(g_off),
            1.0 / np.diag(g), np.ascontiguousarray(ainv), np.ascontiguousarray(h), np.ascontiguousarray(g),
        )
        components.append(_Component(idx, mode, arrays, max_sweeps))
    return tuple(components)


def _colour_order(adjacent: np.ndarray) -> np.ndarray:
    """Channels grouped by a greedy colouring of the spillover graph (largest degree first).

    Gauss-Seidel sweeps in this order update channels that do not spill into each other
    one after the other (as red-black ordering does on a grid); on mass-tagged panels it
    saves one or two sweeps of the ten or so that reach 1e-13.
    """
    n = adjacent.shape[0]
    colour = np.full(n, -1)
    for v in np.argsort(-adjacent.sum(axis=1), kind="stable"):
        used = set(colour[adjacent[v]].tolist())
        c = 0
        while c in used:
            c += 1
        colour[v] = c
    return np.lexsort((np.arange(n), colour))


def _csr(matrix: np.ndarray):
    rows, cols = np.nonzero(matrix)
    ptr = np.zeros(matrix.shape[0] + 1, dtype=np.int64)
    np.add.at(ptr, rows + 1, 1)
    return np.cumsum(ptr), cols.astype(np.int64), np.ascontiguousarray(matrix[rows, cols], dtype=np.float64)


def compensate_array(array: np.ndarray, values: np.ndarray, *, method: str, parallel: bool,
                       max_sweeps: int | None = None, max_exchanges: int = _MAX_EXCHANGES,
                       counts: dict | None = None) -> np.ndarray:
    """numpy kernel driver; ``max_sweeps``/``max_exchanges`` exist to test the fallbacks.

    ``counts``, when given, gains the pixels solved by pivoting (``"pivoted"``) and, of
    those, by the Lawson-Hanson fallback (``"last_resort"``), so a test can see they ran.
    """
    n_channels = array.shape[0]
    if array.dtype not in (np.float32, np.float64):
        array = array.astype(np.float32)
    flat = np.ascontiguousarray(array).reshape(n_channels, -1)
    out = np.empty(flat.shape, dtype=np.float32)
    values = np.ascontiguousarray(values, dtype=np.float64)
    components = _components_cached(values.tobytes(), n_channels)
    kernel = _nnls.compensate_parallel if parallel else _nnls.compensate_serial
    # Threads take the kernel's tasks one at a time: on a shared machine a thread that
    # loses its core for a while does not hold back the others.
    from numba import parallel_chunksize

    with _one_blas_thread(parallel), parallel_chunksize(1):
        for comp in components:
            if comp.mode < 0:
                np.maximum(flat[comp.idx[0]], 0, out=out[comp.idx[0]], casting="unsafe")
                continue
            mode = _nnls.MODE_LINEAR if method == "linear" else comp.mode
            sweeps = comp.max_sweeps if max_sweeps is None else max_sweeps
            pivoted, last_resort = kernel(flat, comp.idx, *comp.arrays, out, mode, _SWEEP_TOLERANCE,
                                          sweeps, max_exchanges)
            if counts is not None:
                counts["pivoted"] = counts.get("pivoted", 0) + int(pivoted)
                counts["last_resort"] = counts.get("last_resort", 0) + int(last_resort)
    return out.reshape(array.shape)


class _one_blas_thread:
    """Hold BLAS to one thread while numba's threads run (two pools fight otherwise)."""

    def __init__(self, active: bool):
        self.active = active
        self.limiter = None

    def __enter__(self):
        if self.active:
            from .._threads import one_thread

            self.limiter = one_thread("blas")
        return self

    def __exit__(self, *exc):
        if self.limiter is not None:
            self.limiter.restore_original_limits()
        return False
