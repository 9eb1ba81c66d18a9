"""The box fit of the ghost model (``excess._box_least_squares``) as one compiled loop (numba).

The Python form spends most of its time in bookkeeping around tiny LAPACK and BLAS calls
(two to a few dozen unknowns, thousands of fits per ROI). :func:`box_fit` runs the same
steps in compiled code and calls the SAME library routines with the same arguments, so it
returns the same bits:

- the Cholesky factor and the triangular solve: scipy's LAPACK ``dpotrf`` / ``dtrtrs``
  (through ``scipy.linalg.cython_lapack``, the library ``scipy.linalg.lapack`` calls);
- the least-squares steps of BVLS: ``dgelsd`` of numpy's own LAPACK (the routine
  ``numpy.linalg.lstsq`` calls, with the workspace it queries), and the products
  ``a.dot(x)``, ``a.T.dot(r)``, ``np.dot(r, r)``: numpy's CBLAS ``dgemv`` / ``ddot``, with
  the order, transposition and leading dimension numpy passes for these layouts.

Everything else (scaling, clipping, the active-set moves) is element-wise IEEE arithmetic,
the same in numpy and here. Whatever the compiled loop does not settle exactly (a value
that is not finite, a factorisation that fails, a tie of signed zeros) it hands back
(status 2) to the Python form, which the tests keep as the reference. The library routines
are found at import (:func:`routines`); where they cannot be found the Python form runs.
"""

from __future__ import annotations

import glob
import os

import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import get_cython_function_address, intrinsic

#: ``lsq_linear``'s default tolerance (``_bvls.TOL``).
TOL = 1e-10

_EPS = np.finfo(np.float64).eps

# CBLAS enumerations (cblas.h)
_ROW_MAJOR, _COL_MAJOR, _NO_TRANS = 101, 102, 111

# indices into the routine addresses
_POTRF, _TRTRS, _GELSD, _DDOT, _DGEMV = range(5)


@intrinsic
def _call_void(typingctx, address, pointers):
    """``((void (*)(void *, ...)) address)(pointers...)``: a routine taking only pointers."""
    sig = types.void(address, pointers)

    def codegen(context, builder, signature, args):
        count = len(signature.args[1])
        void_ptr = ir.IntType(8).as_pointer()
        fnty = ir.FunctionType(ir.VoidType(), [void_ptr] * count)
        fn = builder.inttoptr(args[0], fnty.as_pointer())
        values = [builder.inttoptr(builder.extract_value(args[1], i), void_ptr)
                  for i in range(count)]
        builder.call(fn, values)
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def _call_ddot(typingctx, address, n, x, y):
    """``cblas_ddot(n, x, 1, y, 1)`` of an ILP64 CBLAS (x, y: addresses)."""
    sig = types.float64(address, n, x, y)

    def codegen(context, builder, signature, args):
        i64, dptr = ir.IntType(64), ir.DoubleType().as_pointer()
        fnty = ir.FunctionType(ir.DoubleType(), [i64, dptr, i64, dptr, i64])
        fn = builder.inttoptr(args[0], fnty.as_pointer())
        one = ir.Constant(i64, 1)
        return builder.call(fn, [args[1], builder.inttoptr(args[2], dptr), one,
                                 builder.inttoptr(args[3], dptr), one])

    return sig, codegen


@intrinsic
def _call_dgemv(typingctx, address, order, n, a, x, y):
    """``cblas_dgemv(order, NoTrans, n, n, 1.0, a, n, x, 1, 0.0, y, 1)`` of an ILP64 CBLAS."""
    sig = types.void(address, order, n, a, x, y)

    def codegen(context, builder, signature, args):
        i32, i64, dptr = ir.IntType(32), ir.IntType(64), ir.DoubleType().as_pointer()
        f64 = ir.DoubleType()
        fnty = ir.FunctionType(ir.VoidType(), [i32, i32, i64, i64, f64, dptr, i64, dptr, i64,
                                               f64, dptr, i64])
        fn = builder.inttoptr(args[0], fnty.as_pointer())
        one = ir.Constant(i64, 1)
        builder.call(fn, [builder.trunc(args[1], i32), ir.Constant(i32, _NO_TRANS), args[2],
                          args[2], ir.Constant(f64, 1.0), builder.inttoptr(args[3], dptr),
                          args[2], builder.inttoptr(args[4], dptr), one, ir.Constant(f64, 0.0),
                          builder.inttoptr(args[5], dptr), one])
        return context.get_dummy_value()

    return sig, codegen


def routines() -> np.ndarray | None:
    """Addresses of the routines :func:`box_fit` calls, or None where one cannot be found.

    scipy's ``dpotrf`` / ``dtrtrs`` come from ``scipy.linalg.cython_lapack``; numpy's
    ``dgelsd``, ``cblas_ddot`` and ``cblas_dgemv`` from the OpenBLAS numpy's wheels bundle
    (``numpy.libs/libscipy_openblas64_*``, symbols ``scipy_*64_``); another numpy build
    gives None.
    """
    import ctypes

    try:
        potrf = get_cython_function_address("scipy.linalg.cython_lapack", "dpotrf")
        trtrs = get_cython_function_address("scipy.linalg.cython_lapack", "dtrtrs")
        folder = os.path.join(os.path.dirname(os.path.dirname(np.__file__)), "numpy.libs")
        found = glob.glob(os.path.join(folder, "libscipy_openblas64_*.so"))
        if len(found) != 1:
            return None
        lib = ctypes.CDLL(found[0])
        names = ("scipy_dgelsd_64_", "scipy_cblas_ddot64_", "scipy_cblas_dgemv64_")
        others = [ctypes.cast(getattr(lib, name), ctypes.c_void_p).value for name in names]
    except (AttributeError, OSError, ValueError, ImportError):
        return None
    return np.array([potrf, trtrs, *others], np.int64)


@nb.njit(cache=True, nogil=True)
def _gemv(fn, order, n, a, x, y):
    """y = A x by numpy's call: A is ``a`` (n x n, C order) read with ``order``; row-major
    is ``a.dot(x)``, column-major ``a.T.dot(x)``."""
    y[:] = 0.0
    _call_dgemv(fn[_DGEMV], order, n, a.ctypes.data, x.ctypes.data, y.ctypes.data)


@nb.njit(cache=True, nogil=True)
def _lstsq(fn, a, m, cols, count, b, rcond, out, ints):
    """``numpy.linalg.lstsq(a[:, cols[:count]], b, rcond)[0]`` into ``out[:count]``: numpy's
    ``dgelsd`` call (Fortran copy of the columns, a workspace query, then the solve).
    Returns False where it failed or left a value that is not finite."""
    af = np.empty(m * count)
    for j in range(count):
        for i in range(m):
            af[i + j * m] = a[i, cols[j]]
    ldb = max(m, count, 1)
    bf = np.zeros(ldb)
    bf[:m] = b[:m]
    s = np.empty(min(m, count))
    rc = np.empty(1)
    rc[0] = rcond
    query = np.empty(1)
    # ints: m, n, nrhs, lda, ldb, rank, lwork, iwork (query), info
    ints[0], ints[1], ints[2], ints[3], ints[4] = m, count, 1, max(m, 1), ldb
    ints[6] = -1
    _call_void(fn[_GELSD], (ints[0:].ctypes.data, ints[1:].ctypes.data, ints[2:].ctypes.data,
                            af.ctypes.data, ints[3:].ctypes.data, bf.ctypes.data,
                            ints[4:].ctypes.data, s.ctypes.data, rc.ctypes.data,
                            ints[5:].ctypes.data, query.ctypes.data, ints[6:].ctypes.data,
                            ints[7:].ctypes.data, ints[8:].ctypes.data))
    if ints[8] != 0:
        return False
    work = np.empty(max(int(query[0]), 1))
    iwork = np.empty(max(ints[7], 1), np.int64)
    ints[6] = np.int64(query[0])
    _call_void(fn[_GELSD], (ints[0:].ctypes.data, ints[1:].ctypes.data, ints[2:].ctypes.data,
                            af.ctypes.data, ints[3:].ctypes.data, bf.ctypes.data,
                            ints[4:].ctypes.data, s.ctypes.data, rc.ctypes.data,
                            ints[5:].ctypes.data, work.ctypes.data, ints[6:].ctypes.data,
                            iwork.ctypes.data, ints[8:].ctypes.data))
    ok = ints[8] == 0
    # every buffer is read after the call, so none is released before it
    ok = ok and af.size + s.size + work.size + iwork.size >= 0 and rc[0] == rcond
    for j in range(count):
        out[j] = bf[j]
        if not np.isfinite(bf[j]):
            ok = False
    return ok


@nb.njit(cache=True, nogil=True)
def _cost(fn, a, n, x, b, r, g, tmp):
    """r = a.dot(x) - b, g = a.T.dot(r); returns 0.5 * np.dot(r, r)."""
    _gemv(fn, _ROW_MAJOR, n, a, x, tmp)
    for i in range(n):
        r[i] = tmp[i] - b[i]
    _gemv(fn, _COL_MAJOR, n, a, r, g)
    return 0.5 * (0.0 + _call_ddot(fn[_DDOT], n, r.ctypes.data, r.ctypes.data))


@nb.njit(cache=True, nogil=True)
def _kkt(g, on_bound, n):
    """``_bvls._kkt_violation`` (finite g)."""
    top = 0.0
    for i in range(n):
        v = abs(g[i]) if on_bound[i] == 0 else g[i] * on_bound[i]
        if i == 0 or v > top:
            top = v
    return top


@nb.njit(cache=True, nogil=True)
def _bvls(fn, a, n, b, lb, ub, x, ints):
    """``_bvls._bvls`` from the unconstrained solution in ``x`` (the same steps); False where a
    step is not settled exactly here (then the Python form runs)."""
    on_bound = np.zeros(n)
    for i in range(n):
        if x[i] <= lb[i]:
            x[i] = lb[i]
            on_bound[i] = -1.0
        if x[i] >= ub[i]:
            x[i] = ub[i]
            on_bound[i] = 1.0
    free = np.empty(n, np.int64)
    nfree = 0
    for i in range(n):
        if on_bound[i] == 0.0:
            free[nfree] = i
            nfree += 1
    r, g, tmp = np.empty(n), np.empty(n), np.empty(n)
    z, masked, b_free = np.empty(n), np.empty(n), np.empty(n)
    cost = _cost(fn, a, n, x, b, r, g, tmp)
    iteration = 0
    while nfree > 0:
        iteration += 1
        for i in range(n):
            masked[i] = x[i] * (0.0 if on_bound[i] == 0.0 else 1.0)
        _gemv(fn, _ROW_MAJOR, n, a, masked, tmp)
        for i in range(n):
            b_free[i] = b[i] - tmp[i]
        if not _lstsq(fn, a, n, free, nfree, b_free, _EPS * max(nfree, n), z, ints):
            return False
        kept = 0
        any_v = False
        for j in range(nfree):
            i = free[j]
            if z[j] < lb[i]:
                x[i] = lb[i]
                on_bound[i] = -1.0
                any_v = True
            elif z[j] > ub[i]:
                x[i] = ub[i]
                on_bound[i] = 1.0
                any_v = True
            else:
                x[i] = z[j]
        for j in range(nfree):
            i = free[j]
            if not (z[j] < lb[i] or z[j] > ub[i]):
                free[kept] = i
                kept += 1
        cost = _cost(fn, a, n, x, b, r, g, tmp)
        if any_v:
            nfree = kept
        else:
            break
    for i in range(n):
        if not np.isfinite(g[i]):
            return False
    optimality = _kkt(g, on_bound, n)
    done = False
    for _ in range(iteration, n + iteration):
        if optimality < TOL:
            done = True
        if done:
            break
        move = 0
        top = g[0] * on_bound[0]
        for i in range(1, n):
            if g[i] * on_bound[i] > top:
                top = g[i] * on_bound[i]
                move = i
        on_bound[move] = 0.0
        while True:
            nfree = 0
            for i in range(n):
                masked[i] = x[i] * (0.0 if on_bound[i] == 0.0 else 1.0)
                if on_bound[i] == 0.0:
                    free[nfree] = i
                    nfree += 1
            _gemv(fn, _ROW_MAJOR, n, a, masked, tmp)
            for i in range(n):
                b_free[i] = b[i] - tmp[i]
            if not _lstsq(fn, a, n, free, nfree, b_free, _EPS * max(nfree, n), z, ints):
                return False
            # the first smallest step to a violated bound, lower bounds listed first
            best = -1
            alpha = 0.0
            for side in range(2):
                for j in range(nfree):
                    i = free[j]
                    if side == 0 and z[j] < lb[i]:
                        step = (lb[i] - x[i]) / (z[j] - x[i])
                    elif side == 1 and z[j] > ub[i]:
                        step = (ub[i] - x[i]) / (z[j] - x[i])
                    else:
                        continue
                    if step != step:
                        return False
                    if best < 0 or step < alpha:
                        best, alpha = j + side * n, step
            if best >= 0:
                for j in range(nfree):
                    i = free[j]
                    x[i] = x[i] * (1 - alpha) + alpha * z[j]
                on_bound[free[best % n]] = -1.0 if best < n else 1.0
            else:
                for j in range(nfree):
                    x[free[j]] = z[j]
                break
        cost_new = _cost(fn, a, n, x, b, r, g, tmp)
        if cost - cost_new < TOL * cost:
            done = True
        cost = cost_new
        for i in range(n):
            if not np.isfinite(g[i]):
                return False
        optimality = _kkt(g, on_bound, n)
    return True


@nb.njit(cache=True, nogil=True)
def box_fit(gram, cross, lower, upper, fn, coef):
    """``excess._box_least_squares(gram, cross, lower, upper)`` into ``coef``.

    Returns 0 when done, 2 when the Python form must run instead (one unknown in all, a
    fixed coefficient that is not zero, a value that is not finite, a factorisation that
    fails, a clip that meets a bound exactly)."""
    size = cross.size
    idx = np.empty(size, np.int64)
    nf = 0
    for i in range(size):
        coef[i] = lower[i]
        if upper[i] > lower[i] and gram[i, i] > 0:
            idx[nf] = i
            nf += 1
    if nf == 0:
        return 0
    if nf == size == 1:
        return 2
    for i in range(size):
        for j in range(size):
            if not np.isfinite(gram[i, j]):
                return 2
        if not (np.isfinite(cross[i]) and np.isfinite(lower[i])) or upper[i] != upper[i]:
            return 2
    if nf < size:
        # the fixed part ``gram[idx, fixed] @ coef[fixed]`` is a signed zero when every
        # fixed coefficient is zero and the entries finite (every product is +-0.0, in any
        # order), and ``cross - (+-0.0)`` is ``cross`` except for a cross of -0.0
        k = 0
        for i in range(size):
            if k < nf and idx[k] == i:
                k += 1
            elif lower[i] != 0.0:
                return 2
        for j in range(nf):
            if cross[idx[j]] == 0.0 and np.signbit(cross[idx[j]]):
                return 2
    h = np.empty(nf)
    scale = np.empty(nf)
    lo = np.empty(nf)
    hi = np.empty(nf)
    for j in range(nf):
        i = idx[j]
        scale[j] = np.sqrt(gram[i, i])
    for j in range(nf):
        i = idx[j]
        h[j] = (cross[i] - 0.0) / scale[j]
        lo[j] = lower[i] * scale[j]
        hi[j] = upper[i] * scale[j]
    # g (lower triangle used, Fortran order = its C order, symmetric), scaled, ridged
    c = np.empty(nf * nf)
    for j in range(nf):
        for i in range(nf):
            c[i + j * nf] = gram[idx[i], idx[j]] / (scale[i] * scale[j])
        c[j + j * nf] += 1e-9
    if nf == 1:
        t = h[0] / c[0]
        if t != t or t == lo[0] or t == hi[0]:
            return 2
        t = t if t > lo[0] else lo[0]
        t = t if t < hi[0] else hi[0]
        coef[idx[0]] = t / scale[0]
        return 0
    ints = np.zeros(16, np.int64)
    small = np.zeros(8, np.int32)  # n, nrhs, lda, ldb, info
    chars = np.array([76, 78, 78], np.uint8)  # 'L', 'N', 'N'
    small[0], small[1], small[2], small[3] = nf, 1, nf, nf
    _call_void(fn[_POTRF], (chars.ctypes.data, small[0:].ctypes.data, c.ctypes.data,
                            small[2:].ctypes.data, small[4:].ctypes.data))
    if small[4] != 0:
        return 2
    for j in range(nf):  # clean=1: the upper triangle zeroed
        for i in range(j):
            c[i + j * nf] = 0.0
    rhs = h.copy()
    _call_void(fn[_TRTRS], (chars[0:].ctypes.data, chars[1:].ctypes.data,
                            chars[2:].ctypes.data, small[0:].ctypes.data,
                            small[1:].ctypes.data, c.ctypes.data, small[2:].ctypes.data,
                            rhs.ctypes.data, small[3:].ctypes.data, small[4:].ctypes.data))
    if small[4] != 0 or chars[0] != 76:
        return 2
    # the design chol.T: the factor's Fortran buffer read in C order
    a = c.reshape((nf, nf))
    cols = np.arange(nf)
    x = np.empty(nf)
    if not _lstsq(fn, a, nf, cols, nf, rhs, -1.0, x, ints):
        return 2
    inside = True
    for j in range(nf):
        if not (x[j] >= lo[j] and x[j] <= hi[j]):
            inside = False
    if not inside and not _bvls(fn, a, nf, rhs, lo, hi, x, ints):
        return 2
    for j in range(nf):
        coef[idx[j]] = x[j] / scale[j]
    return 0


def agrees(fn: np.ndarray, reference, count: int = 24) -> bool:
    """Whether :func:`box_fit` with the routines ``fn`` gives ``reference``'s bits (the numpy
    form, ``reference(gram, cross, lower, upper)``) on ``count`` small systems of count bins,
    some sources bounded or fixed, some pushed onto their bounds: a check, once per process,
    that this numpy and scipy call their libraries as :func:`box_fit` assumes."""
    rng = np.random.default_rng(20261206)
    for t in range(count):
        k = 2 + t % 6
        design = rng.poisson(rng.uniform(0.5, 50, (k, 1)), (k, 12 + 3 * k)).astype(np.float64)
        target = rng.poisson(design[0] * 0.5 + 2.0).astype(np.float64)
        gram, cross = design @ design.T, design @ target
        lower = np.zeros(k)
        upper = np.full(k, np.inf) if t % 3 == 0 else np.r_[np.inf, np.full(k - 1, 0.05)]
        if t % 4 == 1:
            upper[-1] = 0.0
        if t % 2:
            cross = cross - rng.uniform(0, 2, k) * np.abs(cross)
        coef = np.empty(k)
        status = box_fit(gram, cross, lower, upper, fn, coef)
        if status == 0 and coef.tobytes() != np.asarray(
                reference(gram, cross, lower, upper), np.float64).tobytes():
            return False
    return True
