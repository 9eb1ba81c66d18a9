"""Compiled per-pixel NNLS for spillover compensation (numba kernels).

The public entry point is :func:`plexwash.qc.spillover.compensate`, which prepares the
matrices (:func:`plexwash.qc.spillover.solver._prepare_components`) and calls the kernels here
once per connected component of the spillover graph.

Each pixel is ``min ||A x - y||_2`` subject to ``x >= 0`` with ``A = S^T`` square,
invertible and close to the identity. Its normal equations use ``G = A^T A`` and
``b = A^T y = S y``; ``G`` is as sparse as the spillover graph allows.

Two exact solvers:

Sweeps (``_block`` in sweep mode) — projected Gauss–Seidel on the normal equations (exact coordinate
descent; Franc, Hlavac & Navara, CAIP 2005, for NNLS). When the Jacobi map ``x_i <-
max(0, (b_i - sum_{j != i} G_ij x_j) / G_ii)`` is a max-norm contraction with factor
``rho = max_i sum_{j != i} |G_ij| / G_ii < 1``, the Gauss–Seidel map is one too, with the
same factor (Bertsekas & Tsitsiklis, *Parallel and Distributed Computation*, 1989,
sec. 3.1), so the sweeps converge to the unique NNLS solution from any start, and a
sweep that changes no entry by more than ``eps`` leaves an error of at most ``eps * rho
/ (1 - rho)``. Spillover matrices are near identity (``rho`` about 0.05–0.25), so about
seven sweeps reach 1e-10 of the pixel's largest count. The sweeps run over a block of
pixels at once with the pixel index innermost: every operation is a long vector
operation over pixels, following the sparse pattern of ``G`` (the same for all pixels),
and the cost per pixel is a few times ``nnz(G)`` multiply-adds. Channels are swept in
the order of a greedy colouring of the spillover graph (like red-black ordering), which
converges a little faster than mass order. Each pixel stops at the end of its own first
quiet sweep and is frozen from then on, so its result does not depend on the other
pixels of its block: chunking a stack changes no bit of the output.

Pivoting (``_pixel_bpp``) — for matrices that are not contractions (``rho >= 0.5``, strong
spillover) and as a fallback: with ``x0 = A^-1 y`` the objective is ``(x - x0)^T G (x -
x0)``, and the KKT conditions form the linear complementarity problem

    x = x0 + H lam,   x >= 0,   lam >= 0,   x * lam = 0,   H = G^-1,

which has exactly one solution (Murty, *Linear Complementarity, Linear and Nonlinear
Programming*, 1988). For a guess of the zero set Z (F the rest) the unknowns follow
from the smaller of ``H_ZZ lam_Z = -x0_Z`` (then ``x = x0 + H[:, Z] lam_Z``) and ``G_FF
x_F = b_F`` (then ``lam = G[:, F] x_F - b``), and the guess is corrected by block
principal pivoting (Judice & Pires, Comput. Oper. Res. 1994; Kim & Park, SIAM J. Sci.
Comput. 2011) with Murty's single-exchange backup rule, which terminates. If rounding
ever stops it, Lawson & Hanson's active-set algorithm (*Solving Least Squares
Problems*, 1974, ch. 23) solves the pixel from scratch.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

#: Pixels per block: long enough for the vector units and the memory prefetchers,
#: small enough that a block's working arrays stay in the core's L2 cache.
LANES = 256
#: Reassociation lets loops vectorise; results stay within rounding of strict order.
_FAST = {"reassoc", "contract"}

MODE_SWEEP, MODE_PIVOT, MODE_LINEAR = 0, 1, 2


# ---------------------------------------------------------------- dense helpers


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _factor(mat, members, start, k, low):
    """Rows ``start:k`` of the Cholesky factor of ``mat[members[:k], members[:k]]``.

    Rows before ``start`` are already factored (members that join are appended, so
    earlier rows stay valid). Returns False if the matrix is not numerically SPD.
    """
    for a in range(start, k):
        ra = members[a]
        for b in range(a):
            s = mat[ra, members[b]]
            for c in range(b):
                s -= low[a, c] * low[b, c]
            low[a, b] = s / low[b, b]
        s = mat[ra, ra]
        for c in range(a):
            s -= low[a, c] * low[a, c]
        if s <= 0.0:
            return False
        low[a, a] = np.sqrt(s)
    return True


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _solve_factored(low, rhs, start, k, fwd, u):
    """``u = L^-T L^-1 rhs``; forward entries before ``start`` are reused from ``fwd``."""
    for a in range(start, k):
        s = rhs[a]
        for c in range(a):
            s -= low[a, c] * fwd[c]
        fwd[a] = s / low[a, a]
    for a in range(k - 1, -1, -1):
        s = fwd[a]
        for c in range(a + 1, k):
            s -= low[c, a] * u[c]
        u[a] = s / low[a, a]


@njit(cache=True, error_model="numpy")
def _lawson_hanson(b, g, x, tol, passive, members, rhs, fwd, u, low):
    """Lawson & Hanson (1974, ch. 23) NNLS on the normal equations ``G x = b``."""
    m = b.shape[0]
    for i in range(m):
        x[i] = 0.0
        passive[i] = 0
    for _outer in range(3 * m + 3):
        best = -1
        best_w = tol
        for i in range(m):
            if passive[i] == 0:
                w = b[i]
                for c in range(m):
                    w -= g[i, c] * x[c]
                if w > best_w:
                    best_w = w
                    best = i
        if best < 0:
            return
        passive[best] = 1
        for _inner in range(3 * m + 3):
            k = 0
            for i in range(m):
                if passive[i]:
                    members[k] = i
                    rhs[k] = b[i]
                    k += 1
            if not _factor(g, members, 0, k, low):
                passive[best] = 0
                return
            _solve_factored(low, rhs, 0, k, fwd, u)
            alpha = 2.0
            for a in range(k):
                i = members[a]
                if u[a] <= 0.0:
                    step = x[i] / (x[i] - u[a])
                    if step < alpha:
                        alpha = step
            if alpha >= 1.0:
                for i in range(m):
                    x[i] = 0.0
                for a in range(k):
                    x[members[a]] = u[a]
                break
            for a in range(k):
                i = members[a]
                x[i] += alpha * (u[a] - x[i])
                if x[i] <= tol:
                    x[i] = 0.0
                    passive[i] = 0


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _pixel_bpp(yv, x0, b, h, g, x, max_exchanges, fs, low, iscr):
    """Exact NNLS of one pixel by block principal pivoting (result in ``x``).

    ``yv`` the pixel, ``x0 = A^-1 yv``, ``b = A^T yv``. Scratch: ``fs`` float (5, m),
    ``low`` float (m, m), ``iscr`` int (3, m). Returns the number of exchanges, or -1
    when the Lawson-Hanson fallback solved the pixel.
    """
    m = x0.shape[0]
    v = fs[0]
    rhs = fs[1]
    fwd = fs[2]
    u = fs[3]
    vec = fs[4]
    zero = iscr[0]
    members = iscr[1]
    flip = iscr[2]
    scale = 0.0
    for i in range(m):
        scale = max(scale, abs(yv[i]))
    tol = 1e-11 * scale + 1e-300
    # Start from the sign pattern of x0 and of one first-order correction of it.
    for i in range(m):
        v[i] = x0[i]
    for c in range(m):
        if x0[c] < 0.0:
            w = x0[c] / h[c, c]
            for i in range(m):
                v[i] -= w * h[c, i]
    nz = 0
    for i in range(m):
        zero[i] = 1 if (x0[i] < 0.0 or v[i] < 0.0) else 0
        nz += zero[i]
    dual = nz <= m - nz
    k = 0
    valid = 0
    rebuild = True
    best = m + 1
    spare = 3
    exchanges = 0
    ok = True
    while True:
        if rebuild:
            k = 0
            for i in range(m):
                if (zero[i] == 1) == dual:
                    members[k] = i
                    k += 1
            valid = 0
            rebuild = False
        mat = h if dual else g
        for a in range(valid, k):
            rhs[a] = -x0[members[a]] if dual else b[members[a]]
        if not _factor(mat, members, valid, k, low):
            ok = False
            break
        _solve_factored(low, rhs, valid, k, fwd, u)
        valid = k
        # vec = x (dual side) or lam (primal side) for every channel.
        for i in range(m):
            vec[i] = x0[i] if dual else -b[i]
        for a in range(k):
            w = u[a]
            row = members[a]
            for i in range(m):
                vec[i] += w * mat[row, i]
        for i in range(m):
            flip[i] = 0
        for a in range(k):
            if u[a] < -tol:
                flip[members[a]] = 1
        n_bad = 0
        last = -1
        for i in range(m):
            if ((zero[i] == 1) != dual) and vec[i] < -tol:
                flip[i] = 1
            if flip[i]:
                n_bad += 1
                last = i
        if n_bad == 0:
            break
        if exchanges >= max_exchanges:
            ok = False
            break
        exchanges += 1
        if n_bad < best:
            best = n_bad
            spare = 3
        elif spare > 0:
            spare -= 1
        else:
            for i in range(m):
                flip[i] = 0
            flip[last] = 1
        nz = 0
        for i in range(m):
            if flip[i]:
                zero[i] = 1 - zero[i]
            nz += zero[i]
        if (nz <= m - nz) != dual:
            dual = not dual
            rebuild = True
            continue
        # Keep factor rows before the first member that leaves the set; append joiners.
        kept = 0
        for a in range(k):
            i = members[a]
            if flip[i]:
                valid = min(valid, a)
            else:
                members[kept] = i
                kept += 1
        k = kept
        for i in range(m):
            if flip[i] and ((zero[i] == 1) == dual):
                members[k] = i
                k += 1
    if ok:
        if dual:
            for i in range(m):
                x[i] = vec[i] if (zero[i] == 0 and vec[i] > 0.0) else 0.0
        else:
            for i in range(m):
                x[i] = 0.0
            for a in range(k):
                if u[a] > 0.0:
                    x[members[a]] = u[a]
        return exchanges
    _lawson_hanson(b, g, x, tol, zero, members, rhs, fwd, u, low)
    return -1


# ---------------------------------------------------------------- block kernels


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _subtract_rows(t, rows, col, val, q, end, sign):
    """``t -= sign * sum_q val[q] * rows[col[q], :]`` for ``q`` in ``[q, end)``.

    Four rows at a time: each pass over ``t`` then does four multiply-adds per load and
    store of ``t`` instead of one (the sweeps are bound by those memory operations).
    """
    while q + 4 <= end:
        w0 = sign * val[q]
        w1 = sign * val[q + 1]
        w2 = sign * val[q + 2]
        w3 = sign * val[q + 3]
        r0 = rows[col[q]]
        r1 = rows[col[q + 1]]
        r2 = rows[col[q + 2]]
        r3 = rows[col[q + 3]]
        for p in range(t.shape[0]):
            t[p] -= (w0 * r0[p] + w1 * r1[p]) + (w2 * r2[p] + w3 * r3[p])
        q += 4
    while q < end:
        w = sign * val[q]
        r = rows[col[q]]
        for p in range(t.shape[0]):
            t[p] -= w * r[p]
        q += 1


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _block(y, idx, s_ptr, s_col, s_val, e_ptr, e_col, e_val, g_ptr, g_col, g_val, g_dinv,
           ainv, h, g, out, start, stop, mode, tol_rel, max_sweeps, max_exchanges, work):
    """Compensate pixels ``start:stop`` of the component whose channels are ``idx``.

    ``work`` is scratch from :func:`_workspace`. Returns ``(pivoted, last_resort)``: the
    pixels solved by pivoting (in sweep mode, those the sweeps left over) and, of those,
    the ones the Lawson-Hanson fallback solved.
    """
    m = idx.shape[0]
    n = stop - start
    yb = work[0]
    x = work[1]
    b = work[2]
    t = work[3, 0]
    change = work[3, 1]
    limit = work[3, 2]
    active = work[3, 3]
    for r in range(m):
        row = idx[r]
        for p in range(n):
            yb[r, p] = y[row, start + p]
        for p in range(n, LANES):
            yb[r, p] = 0.0
    pivoted = 0
    last_resort = 0
    if mode == MODE_SWEEP:
        for p in range(LANES):
            limit[p] = 0.0
        for i in range(m):
            for p in range(LANES):
                t[p] = 0.0
            _subtract_rows(t, yb, s_col, s_val, s_ptr[i], s_ptr[i + 1], -1.0)
            for p in range(LANES):
                b[i, p] = t[p]
            # Start from the first-order compensation y - E^T y, clipped.
            for p in range(LANES):
                t[p] = yb[i, p]
            _subtract_rows(t, yb, e_col, e_val, e_ptr[i], e_ptr[i + 1], 1.0)
            for p in range(LANES):
                x[i, p] = max(t[p], 0.0)
                limit[p] = max(limit[p], abs(yb[i, p]))
        for p in range(LANES):
            limit[p] = limit[p] * tol_rel
        # A pixel stops at the end of the first sweep that moves none of its values by
        # more than its limit; frozen, it no longer depends on the other pixels of the
        # block, so the result is the same however the stack is chunked.
        for p in range(LANES):
            active[p] = 1.0
        remaining = LANES
        for _sweep in range(max_sweeps):
            for p in range(LANES):
                change[p] = 0.0
            for i in range(m):
                for p in range(LANES):
                    t[p] = b[i, p]
                _subtract_rows(t, x, g_col, g_val, g_ptr[i], g_ptr[i + 1], 1.0)
                d = g_dinv[i]
                for p in range(LANES):
                    old = x[i, p]
                    new = max(t[p] * d, 0.0) if active[p] > 0.0 else old
                    change[p] = max(change[p], abs(new - old))
                    x[i, p] = new
            remaining = 0
            for p in range(LANES):
                if change[p] <= limit[p]:
                    active[p] = 0.0
                remaining += active[p] > 0.0
            if remaining == 0:
                break
        if remaining:
            # Only reachable when rounding stalls the sweeps: solve those pixels exactly.
            for p in range(n):
                if active[p] > 0.0:
                    pivoted += 1
                    if _bpp_column(yb[:m], x[:m], p, ainv, h, g, s_ptr, s_col, s_val, max_exchanges) < 0:
                        last_resort += 1
    else:
        every = np.arange(m)
        for r in range(m):
            for p in range(LANES):
                x[r, p] = 0.0
            _subtract_rows(x[r], yb, every, ainv[r], 0, m, -1.0)
        if mode == MODE_LINEAR:
            for r in range(m):
                for p in range(LANES):
                    x[r, p] = max(x[r, p], 0.0)
        else:
            for p in range(n):
                negative = False
                for r in range(m):
                    if x[r, p] < 0.0:
                        negative = True
                if negative:
                    pivoted += 1
                    if _bpp_column(yb[:m], x[:m], p, ainv, h, g, s_ptr, s_col, s_val, max_exchanges) < 0:
                        last_resort += 1
    for r in range(m):
        row = idx[r]
        for p in range(n):
            out[row, start + p] = x[r, p]
    return pivoted, last_resort


@njit(cache=True)
def _workspace(m):
    """Scratch for :func:`_block`: pixels, solution, right-hand side (m rows each) and 4 vectors."""
    return np.empty((4, max(m, 4), LANES))


@njit(cache=True, fastmath=_FAST, error_model="numpy")
def _bpp_column(yb, x, p, ainv, h, g, s_ptr, s_col, s_val, max_exchanges):
    """Solve pixel ``p`` of a block exactly by pivoting; the answer replaces ``x[:, p]``.

    Returns what :func:`_pixel_bpp` returns (-1: the Lawson-Hanson fallback solved it).
    """
    m = yb.shape[0]
    yv = np.empty(m)
    x0 = np.zeros(m)
    b = np.zeros(m)
    for r in range(m):
        yv[r] = yb[r, p]
    for r in range(m):
        for c in range(m):
            x0[r] += ainv[r, c] * yv[c]
        for q in range(s_ptr[r], s_ptr[r + 1]):
            b[r] += s_val[q] * yv[s_col[q]]
    xv = np.empty(m)
    fs = np.empty((5, m))
    low = np.empty((m, m))
    iscr = np.empty((3, m), dtype=np.int64)
    used = _pixel_bpp(yv, x0, b, h, g, xv, max_exchanges, fs, low, iscr)
    for r in range(m):
        x[r, p] = xv[r]
    return used


#: Blocks handled by one task of the parallel loop (its scratch is allocated once).
BLOCKS_PER_TASK = 16


@njit(parallel=True, cache=True)
def compensate_parallel(y, idx, s_ptr, s_col, s_val, e_ptr, e_col, e_val, g_ptr, g_col, g_val,
                        g_dinv, ainv, h, g, out, mode, tol_rel, max_sweeps, max_exchanges):
    """Compensate one spillover component of a (C, N) pixel array; threads over blocks.

    Returns ``(pivoted, last_resort)`` summed over the blocks (see :func:`_block`).
    """
    npix = y.shape[1]
    nblocks = (npix + LANES - 1) // LANES
    ntasks = (nblocks + BLOCKS_PER_TASK - 1) // BLOCKS_PER_TASK
    pivoted = 0
    last_resort = 0
    for task in prange(ntasks):
        work = _workspace(idx.shape[0])
        n_pivot = 0
        n_last = 0
        for blk in range(task * BLOCKS_PER_TASK, min(nblocks, (task + 1) * BLOCKS_PER_TASK)):
            start = blk * LANES
            stop = min(npix, start + LANES)
            a, b = _block(y, idx, s_ptr, s_col, s_val, e_ptr, e_col, e_val, g_ptr, g_col, g_val,
                          g_dinv, ainv, h, g, out, start, stop, mode, tol_rel, max_sweeps,
                          max_exchanges, work)
            n_pivot += a
            n_last += b
        pivoted += n_pivot
        last_resort += n_last
    return pivoted, last_resort


@njit(cache=True, nogil=True)
def compensate_serial(y, idx, s_ptr, s_col, s_val, e_ptr, e_col, e_val, g_ptr, g_col, g_val,
                      g_dinv, ainv, h, g, out, mode, tol_rel, max_sweeps, max_exchanges):
    """:func:`compensate_parallel` on the calling thread (dask already runs blocks in parallel).

    Releases the GIL, so that the blocks of several threads really run at once.
    """
    npix = y.shape[1]
    nblocks = (npix + LANES - 1) // LANES
    work = _workspace(idx.shape[0])
    pivoted = 0
    last_resort = 0
    for blk in range(nblocks):
        start = blk * LANES
        stop = min(npix, start + LANES)
        a, b = _block(y, idx, s_ptr, s_col, s_val, e_ptr, e_col, e_val, g_ptr, g_col,
                      g_val, g_dinv, ainv, h, g, out, start, stop, mode, tol_rel,
                      max_sweeps, max_exchanges, work)
        pivoted += a
        last_resort += b
    return pivoted, last_resort
