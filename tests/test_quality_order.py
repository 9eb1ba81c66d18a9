"""Percentiles by radix selection equal numpy.percentile to the last bit (reference: numpy)."""

from __future__ import annotations

import numpy as np
import pytest
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
