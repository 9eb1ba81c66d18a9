"""Bounded-variable least squares for the tiny dense systems of the ghost fits.

The same steps, in the same order and with the same LAPACK calls, as
``scipy.optimize.lsq_linear(A, b, bounds=(lb, ub), method="bvls")`` with its defaults
(``tol=1e-10``, ``max_iter=None``): the unconstrained ``numpy.linalg.lstsq`` solution
(``rcond=-1``) when it lies within the bounds, else the Stark & Parker BVLS iterations
(P. B. Stark and R. L. Parker, "Bounded-Variable Least-Squares: an Algorithm and
Applications", Computational Statistics 10, 129-141, 1995), each step a
``numpy.linalg.lstsq`` (``rcond=None``) on the free variables. The answer is that
library's to the last bit (``tests/test_quality_bvls.py`` compares them on random and
degenerate systems); what is left out is the input checking, the bookkeeping of
diagnostics nobody reads here, and the result object, which cost more than the solve on a
system of two to a few dozen unknowns, solved hundreds of times per ROI.
"""

from __future__ import annotations

import numpy as np
from numpy.linalg import _umath_linalg

#: ``lsq_linear``'s default tolerance.
TOL = 1e-10


_EPS = np.finfo(np.float64).eps


def lstsq(a: np.ndarray, b: np.ndarray, rcond) -> np.ndarray:
    """``numpy.linalg.lstsq(a, b, rcond)[0]`` for a float64 matrix and vector: the same LAPACK
    call (numpy's ``_umath_linalg.lstsq`` gufunc, ``dgelsd``, with the ``rcond`` numpy
    uses), without the layers of Python around it (the other outputs, the checks).

    A result holding NaN (the call failed, or NaN came in) is handed to numpy's lstsq
    itself, which raises or returns as it does.
    """
    m, n = a.shape
    if (a.dtype != np.float64 or b.dtype != np.float64 or b.ndim != 1 or m == 0 or n == 0
            or b.shape[0] != m):
        return np.linalg.lstsq(a, b, rcond=rcond)[0]
    if rcond is None:
        rcond = _EPS * max(n, m)
    x = _umath_linalg.lstsq(a, b[:, None], rcond, signature="ddd->ddid")[0].reshape(n)
    total = x.sum()
    if total != total:
        return np.linalg.lstsq(a, b, rcond=rcond)[0]
    return x


def bounded_lstsq(a: np.ndarray, b: np.ndarray, lb: np.ndarray, ub: np.ndarray) -> np.ndarray:
    """argmin ||a x - b|| subject to lb <= x <= ub (float64; lb < ub everywhere).

    Examples
    --------
    >>> a = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> bounded_lstsq(a, np.array([2.0, -1.0, 1.0]), np.zeros(2), np.full(2, np.inf))
    array([1.5, 0. ])
    """
    x_lsq = lstsq(a, b, -1)
    if np.all((x_lsq >= lb) & (x_lsq <= ub)):
        return x_lsq
    return _bvls(a, b, x_lsq, lb, ub)


def _kkt_violation(g: np.ndarray, on_bound: np.ndarray) -> float:
    """Largest violation of the KKT conditions (scipy's ``compute_kkt_optimality``)."""
    g_kkt = g * on_bound
    free_set = on_bound == 0
    g_kkt[free_set] = np.abs(g[free_set])
    return np.max(g_kkt)


def _bvls(a, b, x_lsq, lb, ub):
    """BVLS from the clipped unconstrained solution (scipy's ``_lsq.bvls.bvls``, verbose off)."""
    n = a.shape[1]
    x = x_lsq.copy()
    on_bound = np.zeros(n)
    mask = x <= lb
    x[mask] = lb[mask]
    on_bound[mask] = -1
    mask = x >= ub
    x[mask] = ub[mask]
    on_bound[mask] = 1
    free_set = on_bound == 0
    active_set = ~free_set
    free_set, = np.nonzero(free_set)

    r = a.dot(x) - b
    cost = 0.5 * np.dot(r, r)
    g = a.T.dot(r)
    iteration = 0

    # initialisation: solve on the free variables, pin the ones out of bounds, repeat
    while free_set.size > 0:
        iteration += 1
        b_free = b - a.dot(x * active_set)
        z = lstsq(a[:, free_set], b_free, None)
        lbv = z < lb[free_set]
        ubv = z > ub[free_set]
        v = lbv | ubv
        if np.any(lbv):
            ind = free_set[lbv]
            x[ind] = lb[ind]
            active_set[ind] = True
            on_bound[ind] = -1
        if np.any(ubv):
            ind = free_set[ubv]
            x[ind] = ub[ind]
            active_set[ind] = True
            on_bound[ind] = 1
        ind = free_set[~v]
        x[ind] = z[~v]
        r = a.dot(x) - b
        cost = 0.5 * np.dot(r, r)
        g = a.T.dot(r)
        if np.any(v):
            free_set = free_set[~v]
        else:
            break

    max_iter = n + iteration
    done = False
    optimality = _kkt_violation(g, on_bound)
    for _ in range(iteration, max_iter):
        if optimality < TOL:
            done = True
        if done:
            break
        move_to_free = np.argmax(g * on_bound)
        on_bound[move_to_free] = 0
        while True:
            free_set = on_bound == 0
            active_set = ~free_set
            free_set, = np.nonzero(free_set)
            x_free = x[free_set]
            lb_free = lb[free_set]
            ub_free = ub[free_set]
            b_free = b - a.dot(x * active_set)
            z = lstsq(a[:, free_set], b_free, None)
            lbv, = np.nonzero(z < lb_free)
            ubv, = np.nonzero(z > ub_free)
            v = np.hstack((lbv, ubv))
            if v.size > 0:
                alphas = np.hstack((lb_free[lbv] - x_free[lbv],
                                    ub_free[ubv] - x_free[ubv])) / (z[v] - x_free[v])
                i = np.argmin(alphas)
                i_free = v[i]
                alpha = alphas[i]
                x_free *= 1 - alpha
                x_free += alpha * z
                x[free_set] = x_free
                on_bound[free_set[i_free]] = -1 if i < lbv.size else 1
            else:
                x[free_set] = z
                break
        r = a.dot(x) - b
        cost_new = 0.5 * np.dot(r, r)
        if cost - cost_new < TOL * cost:
            done = True
        cost = cost_new
        g = a.T.dot(r)
        optimality = _kkt_violation(g, on_bound)
    return x
