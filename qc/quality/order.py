"""Percentiles of a channel without sorting it: ``numpy.percentile``'s answer, bit for bit.

``numpy.percentile`` (default ``linear`` method) partitions a copy of the whole channel to
find the one or two order statistics around each percentile. :func:`percentile` finds them
by radix selection over the values' keys (:func:`._kernels.order_keys`: two counting passes,
no copy) and then interpolates between them with numpy's own steps and types, so the value
is the same to the last bit (tested against ``numpy.percentile``). Small channels, other
pixel types and channels holding a negative zero are partitioned as numpy does (the same
call on the same copy), without the layers of its Python; NaN goes to numpy itself.
"""

from __future__ import annotations

import numpy as np

from ._kernels import order_keys

#: Channels with fewer values than this are handed to ``numpy.percentile`` (its partition
#: is quick there, and the selection's histograms would cost more than it).
SELECT_SIZE = 1 << 16

_SELECTED = (np.dtype(np.float32), np.dtype(np.uint8), np.dtype(np.uint16), np.dtype(np.uint32))


def percentile(values, q, *, memo: dict | None = None, also=()):
    """``numpy.percentile(values, q)`` over all values (``q`` a number or a list of them).

    ``memo`` (a dict kept with these values) holds the order statistics a radix selection
    found: a later call on the same values for the same percentiles (or those listed in
    ``also``, selected in the same passes) reads them from it.

    Examples
    --------
    >>> values = np.arange(100_000, dtype=np.float32)[::-1]
    >>> float(percentile(values, 50.0)), percentile(values, [50.0, 99.0]).tolist()
    (49999.5, [49999.5, 98999.01])
    """
    arr = np.asarray(values)
    if arr.dtype.kind not in "uif" or arr.size == 0:
        return np.percentile(arr, q)
    flat = np.ascontiguousarray(arr).reshape(-1)
    n = flat.size
    weak, previous, following, ranks, gamma, key = _plan(n, q)
    take = None
    wanted = ranks % n
    if memo is not None and arr.dtype in _SELECTED and all(r in memo for r in wanted.tolist()):
        take = _from_memo(memo, n, flat.dtype)
    elif n >= SELECT_SIZE and arr.dtype in _SELECTED:
        take = _selected(flat, _with_also(key, n, wanted, also), memo)
    if take is None:
        # numpy's own partition of a copy: the order statistics numpy's ranks pick
        ordered = flat.copy()
        # with a memo, the ranks of ``also`` are placed in the same partition and every
        # rank's value kept; not where the values hold a negative zero, whose place among
        # the zeros (so the sign of a zero found) depends on the ranks partitioned for
        kept = memo is not None and arr.dtype in _SELECTED and not _negative_zero(flat)
        if kept:
            wanted = _with_also(key, n, wanted, also)
            ordered.partition(wanted)
        else:
            ordered.partition(ranks)
        if arr.dtype.kind == "f" and np.isnan(ordered[-1]):
            return np.percentile(arr, q)
        if kept:
            memo.update(zip(wanted.tolist(), ordered[wanted], strict=True))
        take = ordered.__getitem__
    low, high = take(previous), take(following)
    return _lerp(low, high, gamma)


#: The ranks and weights of the percentiles asked for, per (count of values, percentiles):
#: they depend on nothing else, and the same few are asked for of every channel.
_PLANS: dict = {}


def _plan_key(n: int, q):
    """A key for :data:`_PLANS` (None where ``q`` is not plain numbers)."""
    if type(q) in (int, float):
        return (n, type(q), q) if q == q else None
    if type(q) in (list, tuple) and all(type(v) in (int, float) and v == v for v in q):
        return (n, type(q), tuple((type(v), v) for v in q))
    return None


def _plan(n: int, q):
    """numpy's steps from ``q`` to the order statistics it interpolates between
    (numpy.lib._function_base_impl: percentile, _quantile, _get_indexes): (weak scalar,
    ranks below, ranks above, every rank to place, the interpolation weights, the key)."""
    key = _plan_key(n, q)
    plan = _PLANS.get(key) if key is not None else None
    if plan is not None:
        return plan
    weak = type(q) in (int, float)
    quantiles = np.true_divide(q, 100, out=...)
    virtual = np.asanyarray((n - 1) * quantiles)
    previous = np.floor(virtual, out=...)
    following = np.add(previous, 1, out=...)
    above = virtual >= n - 1
    if above.any():
        previous[above] = -1
        following[above] = -1
    previous, following = previous.astype(np.intp), following.astype(np.intp)
    ranks = np.unique(np.concatenate(([0, -1], previous.ravel(), following.ravel())))
    gamma = np.asanyarray(np.asanyarray(virtual - previous), dtype=virtual.dtype)
    gamma = float(gamma) if weak else gamma.reshape(virtual.shape)
    for array in (previous, following, ranks, gamma):
        if isinstance(array, np.ndarray):
            array.setflags(write=False)
    plan = (weak, previous, following, ranks, gamma, key)
    if key is not None and len(_PLANS) < 1024:
        _PLANS[key] = plan
    return plan


def _with_also(key, n: int, wanted: np.ndarray, also) -> np.ndarray:
    """``wanted`` and the two ranks around each percentile of ``also``, sorted and unique."""
    also_key = None if key is None else (key, tuple(also))
    if also_key is not None and all(type(a) in (int, float) for a in also):
        found = _PLANS.get(also_key)
        if found is not None:
            return found
    else:
        also_key = None
    ranks = np.unique(np.concatenate([wanted, *(_ranks(n, np.true_divide(a, 100)) for a in also)]))
    ranks.setflags(write=False)
    if also_key is not None and len(_PLANS) < 1024:
        _PLANS[also_key] = ranks
    return ranks


def _negative_zero(flat: np.ndarray) -> bool:
    """Whether float32 values hold a -0.0 (integers never do)."""
    return flat.dtype == np.float32 and bool((flat.view(np.uint32) == 0x80000000).any())


def _ranks(n: int, quantile: float) -> np.ndarray:
    """The two ranks around a quantile's virtual index ((n - 1) q, as in :func:`percentile`)."""
    virtual = (n - 1) * np.float64(quantile)
    low = min(int(np.floor(virtual)), n - 1)
    return np.array([low, min(low + 1, n - 1)])


def _from_memo(memo: dict, n: int, dtype):
    def take(index):
        if index.ndim == 0:
            return memo[int(index) % n]
        return np.array([memo[i % n] for i in index.ravel().tolist()], dtype).reshape(index.shape)

    return take


def _selected(flat: np.ndarray, ranks: np.ndarray, memo: dict | None = None):
    """A function giving the order statistics of ``flat`` at (some of) ``ranks`` as numpy's
    indexing of the partitioned copy would; None where the keys cannot tell (NaN, -0.0).
    The values found are added to ``memo``."""
    is_float = flat.dtype == np.float32
    ranks = np.unique(ranks).astype(np.int64)
    keys = np.empty(ranks.size, np.uint32)
    if not order_keys(flat.view(np.uint32) if is_float else flat, is_float, ranks, keys):
        return None
    if is_float:
        bits = np.where(keys & np.uint32(0x80000000), keys ^ np.uint32(0x80000000), ~keys)
        found = bits.astype(np.uint32).view(np.float32)
    else:
        found = keys.astype(flat.dtype)
    at = {} if memo is None else memo
    at.update(zip(ranks.tolist(), found, strict=True))
    return _from_memo(at, flat.size, flat.dtype)


def _lerp(a, b, t):
    """numpy's interpolation between the order statistics (``_lerp`` of numpy 2)."""
    diff_b_a = b - a
    lerp_interpolation = np.add(a, diff_b_a * t, out=...)
    np.subtract(b, diff_b_a * (1 - t), out=lerp_interpolation, where=t >= 0.5, casting="unsafe",
                dtype=type(lerp_interpolation.dtype))
    if lerp_interpolation.ndim == 0:
        lerp_interpolation = lerp_interpolation[()]
    return lerp_interpolation
