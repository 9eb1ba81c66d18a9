"""The exact searches behind the speckle step's tables (:mod:`.speckle_tests`): Poisson and
binomial thresholds by bisection on scipy's own tail functions, compiled
(:mod:`._search_kernels`), each distinct question asked once and the scalar ones cached.
"""

from __future__ import annotations

import collections
import functools
import threading

import numpy as np
from plexwash.qc.steps import _search_kernels as _sk  # absolute: one numba cache
from scipy import special

#: Entries of the caches of the scalar searches (a channel asks the same ones more than once:
#: its estimate and its statistics; each entry a few numbers).
SCALAR_CACHE = 1024


def poisson_level(rate: float, threshold: float) -> float:
    """Mean ``lambda`` of a Poisson count with ``P(Y > threshold) = rate``."""
    return _poisson_level(float(rate), float(threshold))


@functools.lru_cache(maxsize=SCALAR_CACHE)
def _poisson_level(rate: float, threshold: float) -> float:
    if rate <= 0.0:
        return 0.0
    if rate >= 1.0:
        return float("inf")
    # P(Y > k) = P(Y >= k + 1) = regularised lower incomplete gamma P(k + 1, lambda)
    return float(special.gammaincinv(np.floor(threshold) + 1.0, rate))


def poisson_min_value(level: float, value_alpha: float) -> float:
    """Smallest whole ``v >= 1`` with ``P(Y >= v) < value_alpha``, ``Y ~ Poisson(level)``."""
    return _poisson_min_value(float(level), float(value_alpha))


@functools.lru_cache(maxsize=SCALAR_CACHE)
def _poisson_min_value(level: float, value_alpha: float) -> float:
    if not np.isfinite(level):
        return float("inf")

    def tail(v):  # P(Y >= v) = P(Y > v - 1)
        return special.pdtrc(v - 1, level)

    low, high = 0, 1  # invariant: tail(low) >= value_alpha > tail(high)
    while tail(high) >= value_alpha:
        low, high = high, 2 * high
    while high - low > 1:
        mid = (low + high) // 2
        low, high = (low, mid) if tail(mid) < value_alpha else (mid, high)
    return float(high)


def poisson_min_values(levels, value_alpha: float) -> np.ndarray:
    """:func:`poisson_min_value` of each entry of ``levels`` (float64 array): every entry takes
    the same doubling and bisection steps, with the same ``pdtrc`` comparisons (scipy's own
    function, compiled loop), as the scalar function, so the results are equal."""
    levels = np.asarray(levels, np.float64)
    out = np.full(levels.shape, np.inf)
    finite = np.isfinite(levels)
    found = np.empty(int(finite.sum()), np.float64)
    _sk.poisson_search(np.ascontiguousarray(levels[finite]), float(value_alpha), _special_functions()[1], found)
    out[finite] = found
    return out


@functools.cache
def _special_functions():
    """scipy's ``bdtrc(double k, long n, double p)`` and ``pdtrc(double k, double m)``, the
    functions ``scipy.special.bdtrc``/``pdtrc`` compute on int64 counts and float64 values, as
    C function pointers the compiled searches call (``scipy.special.cython_special``)."""
    import ctypes

    from numba.extending import get_cython_function_address

    module = "scipy.special.cython_special"
    bdtrc = ctypes.CFUNCTYPE(ctypes.c_double, ctypes.c_double, ctypes.c_long, ctypes.c_double, ctypes.c_int)(
        get_cython_function_address(module, "__pyx_fuse_1bdtrc"))
    pdtrc = ctypes.CFUNCTYPE(ctypes.c_double, ctypes.c_double, ctypes.c_double, ctypes.c_int)(
        get_cython_function_address(module, "pdtrc"))
    return bdtrc, pdtrc


def binomial_min_count(trials: np.ndarray, rate, alpha: float) -> np.ndarray:
    """Smallest ``k`` with ``P(N >= k) < alpha``, ``N ~ Binomial(trials, rate)``, per entry.

    ``rate`` is a number or an array broadcast with ``trials``. ``k = trials + 1`` (never
    kept) when even ``P(N = trials)`` is not below ``alpha``.
    """
    trials, rate = np.broadcast_arrays(np.asarray(trials, np.int64), np.asarray(rate, np.float64))
    if trials.size == 1:  # one search, asked again by a channel's statistics: cached
        return np.full(trials.shape, _one_binomial_min_count(int(trials.flat[0]), float(rate.flat[0]), float(alpha)),
                       np.int64)
    # Each entry's search is its own (the same steps whatever the other entries), so a table
    # that repeats trial counts (a window's a x b - 1) and rates is searched once per distinct
    # (trials, rate) pair of the product of both, when that product is smaller.
    shape = trials.shape
    unique_trials, trial_at = np.unique(trials.ravel(), return_inverse=True)
    unique_rates, rate_at = np.unique(rate.ravel(), return_inverse=True)
    if unique_trials.size * unique_rates.size < trials.size:
        return _binomial_grid(unique_trials, unique_rates, alpha)[trial_at.ravel(), rate_at.ravel()].reshape(shape)
    high = np.empty(trials.size, np.int64)
    _sk.binomial_search(np.array(trials, np.int64).ravel(), np.array(rate, np.float64).ravel(),
                       np.full(trials.size, float(alpha)), _special_functions()[0], high)
    return high.reshape(shape)


@functools.lru_cache(maxsize=SCALAR_CACHE)
def _one_binomial_min_count(trials: int, rate: float, alpha: float) -> int:
    high = np.empty(1, np.int64)
    _sk.binomial_search(np.array([trials], np.int64), np.array([rate], np.float64), np.array([alpha]),
                       _special_functions()[0], high)
    return int(high[0])


class _ArrayCache:
    """A bounded, thread-safe cache of small arrays by exact keys (bytes of the inputs): the
    least recently used entry goes first once ``size`` are held; each hit hands out a copy."""

    def __init__(self, size: int):
        self._size = size
        self._entries: collections.OrderedDict = collections.OrderedDict()
        self._lock = threading.Lock()

    def get(self, key):
        with self._lock:
            found = self._entries.get(key)
            if found is None:
                return None
            self._entries.move_to_end(key)
            return found.copy()

    def put(self, key, value: np.ndarray) -> None:
        with self._lock:
            self._entries[key] = value.copy()
            self._entries.move_to_end(key)
            while len(self._entries) > self._size:
                self._entries.popitem(last=False)


#: Searched columns of grids kept by their exact trials, rate and alpha: the channels of a cohort
#: that have the same fitted rate (a fraction of whole window counts) share their tables'
#: searches. Each entry a column of a few dozen numbers.
_COLUMNS = _ArrayCache(SCALAR_CACHE)


def _binomial_grid(trials: np.ndarray, rates: np.ndarray, alpha: float) -> np.ndarray:
    """:func:`binomial_min_count` of every pair of the 1-D ``trials`` and ``rates``, ``(T, R)``.

    Each rate's column is its own search (the same steps whatever the other rates), so a column
    searched before for the same trials, rate and alpha is taken from :data:`_COLUMNS`; the
    others are searched together."""
    trials = np.ascontiguousarray(trials, np.int64)
    rates = np.ascontiguousarray(rates, np.float64).ravel()
    base = (trials.tobytes(), float(alpha))
    grid = np.empty((trials.size, rates.size), np.int64)
    keys = [(base, rate.tobytes()) for rate in rates]
    missing = []
    for r, key in enumerate(keys):
        column = _COLUMNS.get(key)
        if column is None:
            missing.append(r)
        else:
            grid[:, r] = column
    if missing:
        searched = _searched_grid(trials, rates[missing], alpha)
        grid[:, missing] = searched
        for k, r in enumerate(missing):
            _COLUMNS.put(keys[r], searched[:, k])
    return grid


def _searched_grid(trials: np.ndarray, rates: np.ndarray, alpha: float) -> np.ndarray:
    """The search behind :func:`_binomial_grid`."""
    order = np.argsort(trials, kind="stable")
    out = np.empty((trials.size, np.size(rates)), np.int64)
    _sk.binomial_grid_search(np.ascontiguousarray(trials[order]), np.ascontiguousarray(rates, np.float64).ravel(),
                             float(alpha), _special_functions()[0], out)
    grid = np.empty_like(out)
    grid[order] = out
    return grid


@functools.lru_cache(maxsize=16)
def _window_trials(radius: int) -> tuple[np.ndarray, np.ndarray]:
    """The distinct neighbour counts ``max(a * b - 1, 0)`` of windows clipped to ``a`` x ``b``
    pixels (``a, b <= 2r + 1``), and where each ``(a, b)`` finds its count among them."""
    side = 2 * radius + 1
    a, b = np.meshgrid(np.arange(side + 1), np.arange(side + 1), indexing="ij")
    distinct, at = np.unique(np.maximum(a * b - 1, 0), return_inverse=True)
    distinct.flags.writeable = False
    at.flags.writeable = False
    return distinct, at.reshape(side + 1, side + 1)


def min_count_table(radius: int, rate, alpha: float) -> np.ndarray:
    """``table[..., a, b]``: smallest kept neighbour count for a window of ``a`` x ``b`` pixels.

    ``rate`` is one rate or a 1-D array of them (one table each, stacked first). Each
    distinct (neighbour count, rate) pair is searched once.
    """
    rate = np.asarray(rate, np.float64)
    distinct, at = _window_trials(int(radius))
    rates, rate_at = np.unique(rate.ravel(), return_inverse=True)
    grid = _binomial_grid(distinct, rates, alpha).astype(np.int32)  # (T, R)
    tables = np.ascontiguousarray(grid.T[:, at])  # (R, a, b): one table per distinct rate
    return tables[rate_at.reshape(rate.shape)]  # whole tables repeated: C-contiguous


def _rate_tables(trials: np.ndarray, rates: np.ndarray, alpha: float) -> np.ndarray:
    """``table[z, t]`` = :func:`binomial_min_count` of ``trials[t]`` (1-D, distinct) at ``rates[z]``,
    each distinct rate searched once."""
    distinct, at = np.unique(rates, return_inverse=True)
    return _binomial_grid(trials, distinct, alpha).T[at.ravel()]


def _min_count_tables(requests, rates: np.ndarray, rim_trials: int, rim_alpha: float) -> list:
    """:func:`min_count_table` of each ``(radius, alpha)`` of ``requests`` at ``rates`` (int32), then
    the rim table (``binomial_min_count`` of ``0 .. rim_trials - 1`` neighbours at ``rim_alpha``,
    ``(R, rim_trials)`` int32; ``(R, 0)`` when ``rim_trials`` is 0). Each distinct (neighbour count,
    rate) pair is searched once per alpha (each search is its own, whatever else is searched)."""
    asked = [(_window_trials(r)[0], float(alpha)) for r, alpha in requests]
    if rim_trials:
        asked.append((np.arange(rim_trials, dtype=np.int64), float(rim_alpha)))
    distinct_rates, rate_at = np.unique(rates, return_inverse=True)
    rate_at = rate_at.ravel()
    grids = {}
    for alpha in {alpha for _, alpha in asked}:
        union = np.unique(np.concatenate([trials for trials, a in asked if a == alpha]))
        grids[alpha] = (union, _binomial_grid(union, distinct_rates, alpha).astype(np.int32))
    out = []
    for k, (trials, alpha) in enumerate(asked):
        union, grid = grids[alpha]
        rows = grid[np.searchsorted(union, trials)].T[rate_at]  # (rates, trials)
        out.append(rows[..., _window_trials(requests[k][0])[1]] if k < len(requests) else rows)
    if not rim_trials:
        out.append(np.zeros((len(rates), 0), np.int32))
    return out
