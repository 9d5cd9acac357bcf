"""The compiled sort the loader puts every set in order with."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lshjob.ingest.grouping import sort_range


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(min_value=-(2**63), max_value=2**63 - 1), max_size=300), st.data())
def test_sort_range_sorts_exactly_the_range(values, data):
    # Reference: numpy's sort of the same slice; the rest of the array is left as it was.
    a = np.array(values, dtype=np.int64)
    lo = data.draw(st.integers(0, len(a)))
    hi = data.draw(st.integers(lo, len(a)))
    expected = a.copy()
    expected[lo:hi] = np.sort(a[lo:hi])
    sort_range(a, lo, hi)
    assert np.array_equal(a, expected)


def test_sort_range_on_shapes_that_defeat_simple_quicksorts():
    # Reference: numpy's sort. Sorted, reversed, all equal, few distinct values, organ pipe
    # and odd-then-even values: shapes on which a quicksort's pivot choice goes wrong; each
    # must sort, and the depth limit (numpy's sort past it) keeps every shape fast.
    n = 20_000
    half = np.arange(n // 2)
    shapes = {
        "sorted": np.arange(n), "reversed": np.arange(n)[::-1], "equal": np.zeros(n),
        "few": np.random.default_rng(1).integers(0, 3, n), "organ": np.r_[half, half[::-1]],
        "interleaved": np.r_[np.arange(1, n, 2), np.arange(0, n, 2)],
    }
    for name, shape in shapes.items():
        a = shape.astype(np.int64)
        sort_range(a, 0, n)
        assert np.array_equal(a, np.sort(shape.astype(np.int64))), name


@pytest.mark.parametrize("shape", ["uniform", "clustered", "one key", "wide"])
def test_key_lookups_find_what_searchsorted_finds(shape):
    # Oracle: numpy's searchsorted where the value is a key, -1 where it is not, for values
    # below, among and past the keys; buckets from one key each to many keys each, the
    # binary search over all keys, and the direct table.
    from lshjob.ingest.grouping import bucket_starts, lookup, lookup_bucketed, search_sorted_parallel

    rng = np.random.default_rng(3)
    keys = {"uniform": rng.integers(-10**12, 10**12, 5000),
            "clustered": np.concatenate([rng.integers(0, 100, 3000), rng.integers(10**15, 10**15 + 50, 3000)]),
            "one key": np.array([42]),
            "wide": np.array([-(2**60), 0, 2**60 + 5])}[shape]
    keys = np.unique(keys).astype(np.int64)
    span = int(keys[-1]) - int(keys[0])
    values = np.concatenate([keys, rng.choice(keys, 2000), keys - 1, keys + 1, [keys[0] - 10**9, keys[-1] + 10**9]])
    chosen = max(0, (span // len(keys)).bit_length() - 1)  # as the loader picks it: about a key a bucket
    values = values.astype(np.int64)
    at = np.searchsorted(keys, values)
    expected = np.where((at < len(keys)) & (keys[np.minimum(at, len(keys) - 1)] == values), at, -1)
    assert (expected == -1).any() and (expected >= 0).any()
    for shift in {chosen, max(0, chosen - 3), min(chosen + 6, 61)}:
        starts = bucket_starts(keys, shift)
        assert np.array_equal(lookup_bucketed(keys, starts, shift, values), expected)
    assert np.array_equal(search_sorted_parallel(keys, values), expected)
    if span < 10**6:
        table = np.full(span + 1, -1, dtype=np.int64)
        table[keys - keys[0]] = np.arange(len(keys))
        assert np.array_equal(lookup(table, keys[0], values), expected)
