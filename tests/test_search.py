"""The selection the compiled kernels share (lshjob/core/search.py kth_smallest), used by the
top-k cut to find the partner that fills a list at a tied value. Oracle: numpy's sort, the
value at position k of the sorted array."""

from __future__ import annotations

import numpy as np
import pytest

from lshjob.core.search import kth_smallest


def _shapes(rng, n):
    """Arrays that trip simple selections: random with many repeats, sorted, reversed, all
    equal, two values, organ pipe (up then down), and sorted with the largest first."""
    base = rng.integers(0, max(2, n // 3), n)
    ramp = np.arange(n)
    yield "repeats", base
    yield "sorted", ramp
    yield "reversed", ramp[::-1].copy()
    yield "equal", np.full(n, 7)
    yield "two values", rng.integers(0, 2, n)
    yield "organ pipe", np.concatenate([ramp[: n // 2], ramp[: n - n // 2][::-1]])
    yield "rotated", np.roll(ramp, 1)


@pytest.mark.parametrize("n", [1, 2, 3, 10, 257, 5000])
def test_kth_smallest_is_the_value_at_k_of_the_sorted_array(n):
    rng = np.random.default_rng(n)
    for name, values in _shapes(rng, n):
        expected = np.sort(values)  # oracle: numpy
        for k in sorted({0, n // 2, n - 1, int(rng.integers(0, n))}):
            work = values.astype(np.int64).copy()
            assert kth_smallest(work, k) == expected[k], (name, n, k)
            assert np.array_equal(np.sort(work), expected), (name, n, k)  # reordered, nothing lost
