"""Percentiles by radix selection equal numpy.percentile to the last bit (reference: numpy)."""

from __future__ import annotations

import numba as nb
import numpy as np
import pytest
from plexwash.qc.quality._kernels import _order_key, order_keys
from plexwash.qc.quality.order import SELECT_SIZE, percentile


def _same(a, b) -> bool:
    return (type(a) is type(b) and np.asarray(a).dtype == np.asarray(b).dtype
            and np.asarray(a).tobytes() == np.asarray(b).tobytes())


def _channels(rng):
    n = SELECT_SIZE + 17
    yield rng.poisson(rng.uniform(0.01, 50), (n // 257 + 1, 257)).astype(np.float32)  # counts
    yield rng.normal(0.0, 3.0, n).astype(np.float32)  # washed: negatives, fractions
    yield rng.integers(0, 65535, n).astype(np.uint16)
    yield rng.poisson(2.0, n).astype(np.uint16)
    yield rng.integers(0, 2**32 - 1, n, dtype=np.uint64).astype(np.uint32)
    yield rng.poisson(0.3, n).astype(np.uint8)
    yield np.full(n, -1.5, np.float32)  # every value equal
    sparse = (rng.gamma(0.5, 10.0, n) * (rng.random(n) < 0.5)).astype(np.float32)
    sparse[rng.random(n) < 0.01] = np.inf
    sparse[:5] = -np.inf
    yield sparse
    tiny = rng.normal(0, 1e-38, n).astype(np.float32)  # subnormals both sides of zero
    tiny[tiny == 0] = 1e-45
    yield tiny
    yield rng.poisson(1.0, 1000).astype(np.float32)  # small: numpy's partition, by us
    yield rng.normal(size=n)  # float64: numpy's partition, by us
    small = rng.poisson(0.5, (40, 31)).astype(np.float32)
    small[small == 0] = -0.0  # signed zeros: the same partition call puts the same zero there
    small[::7] = 0.0
    yield small
    yield rng.integers(-300, 300, 999).astype(np.int16)
    yield rng.integers(-2**40, 2**40, 5000)
    yield np.array([3.5], np.float32)
    yield np.array([[7, 1]], np.uint16)


@pytest.mark.parametrize("q", [[50.0, 99.0], 50.0, [0.0, 100.0], 37.3, 100.0, 0.0, [99.0, 1.0, 99.0]])
def test_percentile_is_numpys_bit_for_bit(q):
    rng = np.random.default_rng(7)
    with np.errstate(invalid="ignore"):  # inf - inf between two infinite order statistics
        for values in _channels(rng):
            assert _same(percentile(values, q), np.percentile(values, q)), values.dtype


def test_nan_and_negative_zero_are_left_to_numpy():
    rng = np.random.default_rng(8)
    values = rng.poisson(1.0, SELECT_SIZE + 3).astype(np.float32)
    zeros = values.copy()
    zeros[zeros == 0] = -0.0  # which zero sits at the rank only numpy's partition says
    assert _same(percentile(zeros, [50.0, 99.0]), np.percentile(zeros, [50.0, 99.0]))
    values[10] = np.nan
    assert np.isnan(percentile(values, [50.0, 99.0])).all()
    assert np.isnan(np.percentile(values, [50.0, 99.0])).all()


def test_every_rank_of_a_shuffled_range():
    # the order statistics themselves: q = 100 k / (n - 1) lands on rank k exactly
    rng = np.random.default_rng(9)
    n = SELECT_SIZE + 1
    values = rng.permutation(n).astype(np.float32) - 1000.0
    for k in rng.integers(0, n, 40).tolist():
        q = 100.0 * k / (n - 1)
        assert _same(percentile(values, q), np.percentile(values, q))


def test_the_memo_serves_the_second_call_on_the_same_values():
    rng = np.random.default_rng(10)
    values = rng.poisson(3.0, (300, 301)).astype(np.float32)
    memo = {}
    assert _same(percentile(values, 50.0, memo=memo, also=(99.0,)), np.percentile(values, 50.0))
    assert _same(percentile(values, [50.0, 99.0], memo=memo), np.percentile(values, [50.0, 99.0]))
    # the second call read the memo, not the values (a stand-in of the same size shows it)
    stand_in = np.zeros_like(values)
    assert _same(percentile(stand_in, [50.0, 99.0], memo=memo), np.percentile(values, [50.0, 99.0]))
    # a percentile the memo lacks is selected afresh
    assert _same(percentile(values, 10.0, memo=memo), np.percentile(values, 10.0))


def test_the_memo_of_a_small_channel_is_filled_by_numpys_partition():
    """Below SELECT_SIZE the partition numpy would make places the ``also`` ranks too and
    keeps every rank's value; the second call reads them (reference: numpy.percentile)."""
    rng = np.random.default_rng(11)
    for values in (rng.poisson(3.0, (96, 96)).astype(np.float32),
                   rng.normal(0, 2, (50, 61)).astype(np.float32),
                   rng.poisson(40.0, (33, 40)).astype(np.uint16),
                   rng.poisson(0.2, (96, 96)).astype(np.uint8)):
        memo = {}
        assert _same(percentile(values, 50.0, memo=memo, also=(99.0,)),
                     np.percentile(values, 50.0))
        assert memo  # filled
        stand_in = np.zeros_like(values)  # the second call must not look at the values
        assert _same(percentile(stand_in, [50.0, 99.0], memo=memo),
                     np.percentile(values, [50.0, 99.0]))


def test_a_small_channel_with_a_negative_zero_keeps_no_memo():
    """Which zero lands on a rank depends on the ranks partitioned for: with a -0.0 among the
    values nothing is kept, and each call partitions as numpy does (reference: numpy)."""
    values = np.random.default_rng(12).poisson(0.5, (40, 31)).astype(np.float32)
    values[values == 0] = -0.0
    values[::7] = 0.0
    memo = {}
    assert _same(percentile(values, 50.0, memo=memo, also=(99.0,)), np.percentile(values, 50.0))
    assert memo == {}
    assert _same(percentile(values, [50.0, 99.0], memo=memo), np.percentile(values, [50.0, 99.0]))


def test_the_ranks_kept_per_size_serve_other_values_of_that_size():
    """The ranks and weights are reused for every channel of a size; each channel's answer
    is still its own (reference: numpy.percentile), for scalars, lists and numpy scalars."""
    rng = np.random.default_rng(13)
    for q in (50.0, 50, [50.0, 99.0], (1, 99.5), np.float64(37.5), [np.float64(2.0), 98.0]):
        for _ in range(3):
            for values in (rng.poisson(2.0, (96, 96)).astype(np.float32),
                           rng.normal(size=SELECT_SIZE + 5).astype(np.float32)):
                assert _same(percentile(values, q), np.percentile(values, q))
                assert _same(percentile(values, q, memo={}, also=(99.0,)),
                             np.percentile(values, q))


@nb.njit(cache=True)
def _order_keys_before(values, is_float, ranks, out):
    """order_keys as it was before its second pass looked rows up in a table (the reference)."""
    size = values.size
    counts = np.zeros(65536, np.int64)
    for i in range(size):
        bits = np.uint32(values[i])
        if is_float and ((bits & np.uint32(0x7F800000)) == np.uint32(0x7F800000)
                         and (bits & np.uint32(0x007FFFFF)) != 0 or bits == np.uint32(0x80000000)):
            return False
        counts[_order_key(values[i], is_float) >> np.uint32(16)] += 1
    n_ranks = ranks.size
    top = np.zeros(n_ranks, np.int64)
    before = np.empty(n_ranks, np.int64)
    for j in range(n_ranks):
        seen = 0
        for b in range(65536):
            if seen + counts[b] > ranks[j]:
                top[j] = b
                before[j] = seen
                break
            seen += counts[b]
    low = np.zeros((n_ranks, 65536), np.int64)
    for i in range(size):
        key = _order_key(values[i], is_float)
        high = np.int64(key >> np.uint32(16))
        for j in range(n_ranks):
            if top[j] == high:
                low[j, np.int64(key & np.uint32(0xFFFF))] += 1
                break
    for j in range(n_ranks):
        first = j
        for m in range(j):
            if top[m] == top[j]:
                first = m
                break
        seen = before[j]
        for b in range(65536):
            if seen + low[first, b] > ranks[j]:
                out[j] = (np.uint32(top[j]) << np.uint32(16)) | np.uint32(b)
                break
            seen += low[first, b]
    return True


def test_order_keys_equal_their_previous_form():
    """The table look-up of the second pass finds the same keys as the loop over the ranks
    it replaced (kept above as the reference), ranks sharing a top half included."""
    rng = np.random.default_rng(14)
    for values in _channels(rng):
        flat = np.ascontiguousarray(values).reshape(-1)
        if flat.dtype not in (np.float32, np.uint8, np.uint16, np.uint32):
            continue
        is_float = flat.dtype == np.float32
        view = flat.view(np.uint32) if is_float else flat
        n = flat.size
        for ranks in (np.array([0, n - 1]), np.unique(rng.integers(0, n, 9)),
                      np.array([-1, 0, n // 2, n // 2 + 1, (99 * (n - 1)) // 100, n - 1])):
            ranks = np.unique(ranks).astype(np.int64)
            got, want = np.zeros(ranks.size, np.uint32), np.zeros(ranks.size, np.uint32)
            ok = order_keys(view, is_float, ranks, got)
            assert ok == _order_keys_before(view, is_float, ranks, want)
            if ok:
                assert got.tobytes() == want.tobytes()
