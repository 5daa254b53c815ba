"""meshcheck.arrays against numpy's own set routines."""
from __future__ import annotations

import numpy as np

from meshcheck.arrays import sorted_distinct


def test_sorted_distinct_is_numpys_unique():
    # the small sets of frequencies, ranks, values and ids the audit takes apart without
    # np.unique (whose first call imports numpy.ma)
    rng = np.random.default_rng(11)
    cases = [np.zeros(0, np.int64), np.array([3], np.int64), rng.integers(0, 9, 40),
             rng.integers(-5, 5, 7).astype(np.float64), rng.normal(size=30),
             np.array([2.0, 2.0, 1.0, 0.0, 0.0]), np.array([[4, 1], [1, 4]], np.int32),
             rng.integers(0, 50, 1000).astype(np.int32)]
    for a in cases:
        got = sorted_distinct(a)
        assert got.dtype == a.dtype and np.array_equal(got, np.unique(a))


def test_sorted_distinct_as_union1d():
    a, b = np.array([1, 5, 9], np.int64), np.array([0, 5, 7, 9, 12], np.int64)
    assert np.array_equal(sorted_distinct(np.concatenate((a, b))), np.union1d(a, b))
