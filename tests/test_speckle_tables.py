"""The vectorised Poisson cut equals the scalar search entry for entry (the scalar form is the
reference: both compare ``scipy.special.pdtrc`` tails, the Poisson upper tail)."""

from __future__ import annotations

import numpy as np
import pytest
from plexwash.qc.steps.speckle_tests import line_offsets, poisson_min_value, poisson_min_values


@pytest.mark.parametrize("alpha", [1e-12, 1e-6, 0.003, 0.01, 0.2, 0.5])
def test_poisson_min_values_equal_the_scalar_search(alpha):
    rng = np.random.default_rng(7)
    levels = np.concatenate([rng.exponential(0.2, 300), rng.exponential(20.0, 100), rng.uniform(0, 1e4, 20),
                             [0.0, 1e-300, 1e-9, 0.5, 1.0, 3.0, np.inf, -np.inf, np.nan]])
    expected = np.array([poisson_min_value(v, alpha) for v in levels])
    got = poisson_min_values(levels, alpha)
    np.testing.assert_array_equal(got, expected)


def test_line_offsets_are_cached_and_read_only():
    first = line_offsets(4)
    assert line_offsets(4) is first and not first.flags.writeable
    assert first.shape[1:] == (8, 2)


def _line_marks_by_hand(image, threshold, upper, offsets, zone, table):
    """The line rule written out plainly (every line, every pixel counted, no early exits)."""
    height, width = image.shape
    marks = np.zeros(image.shape, np.uint8)
    for y in range(height):
        for x in range(width):
            if not image[y, x] > threshold:
                continue
            for line in offsets:
                inside = [(y + dy, x + dx) for dy, dx in line if 0 <= y + dy < height and 0 <= x + dx < width]
                dim = [threshold < image[p] <= upper for p in inside]
                half = len(line) // 2
                first = [threshold < image[y + dy, x + dx] <= upper for dy, dx in line[:half]
                         if 0 <= y + dy < height and 0 <= x + dx < width]
                ahead = sum(first)
                behind = sum(dim) - ahead
                if ahead > 0 and behind > 0 and ahead + behind >= table[zone[y, x], len(inside)]:
                    marks[y, x] = 1
                    break
    return marks


@pytest.mark.parametrize("rate", [0.05, 0.3, 0.8])
def test_line_kernel_equals_the_rule_written_out(rate):
    from plexwash.qc.steps import _kernels as k

    rng = np.random.default_rng(int(rate * 100))
    image = rng.poisson(rate, (40, 40)).astype(np.float32)
    image[10:30, 20] += rng.poisson(2.0, 20)  # a fibre
    image[5, 5] = 40.0  # bright: not dim
    offsets = np.asarray(line_offsets(4))
    zone = (np.arange(40)[None, :] >= 20).astype(np.uint8) * np.ones((40, 1), np.uint8)
    trials = np.arange(offsets.shape[1] + 1)
    table = np.stack([np.maximum(trials // 2, 2), np.maximum(trials - 2, 1)]).astype(np.int32)
    got = np.zeros(image.shape, np.uint8)
    k.line_dense(image, np.float32(0.5), 20.0, offsets, zone, table, got)
    np.testing.assert_array_equal(got, _line_marks_by_hand(image, 0.5, 20.0, offsets, zone, table))
