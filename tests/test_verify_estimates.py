"""The verified pairs' estimate (lshjob/index/verify/estimates.py), signed a block of sets or a
chunk of positions at a time. Oracle: the fraction of equal positions of the two sets' signatures, counted with numpy
over one signature matrix of every set (the signing itself is checked against its documented
definition in tests/test_signatures.py)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.index.verify.estimates import add_estimates_between
from lshjob.sign.signatures import SignatureParams, comparable, sign_membership


@pytest.mark.parametrize("max_bytes", [1, 8 * 3000 * 5, None])  # blocks; all sets, 5 of 16 positions at a time; all
@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_estimates_in_blocks_are_the_fraction_of_equal_positions(scheme, max_bytes):
    rng = np.random.default_rng(4)
    n = 3000  # more sets than the smallest block (1024): three blocks a side
    sizes = rng.integers(1, 8, n)
    rows = pl.DataFrame({"entity": np.repeat(np.arange(n), sizes),
                         "element": rng.integers(0, 40, int(sizes.sum()))}).unique()
    sets = ElementSets.from_sets(rows)
    params = SignatureParams(scheme=scheme, perms=16, seed=3)
    left = rng.integers(0, n - 1, 5000)
    right = left + rng.integers(1, n - left)
    verified = pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": np.full(len(left), 0.5),
                             "bands_shared": np.ones(len(left), dtype=np.int32)})
    # one part, and the two sides given apart (the sets of two ranges: here the same sets twice)
    same = add_estimates_between(verified, sets, 0, sets, 0, params, max_bytes=max_bytes)
    apart = add_estimates_between(verified, sets, 0, ElementSets(sets.keys, sets.offsets, sets.elements), 0,
                                  params, max_bytes=max_bytes)
    whole = comparable(sign_membership(sets, np.arange(n), params), params)
    want = (whole[left] == whole[right]).mean(axis=1)  # oracle: numpy over all signatures at once
    assert np.array_equal(same["estimate"].to_numpy(), want)
    assert np.array_equal(apart["estimate"].to_numpy(), want)
    assert same.select("left_rep", "right_rep").equals(verified.select("left_rep", "right_rep"))
    assert 0 < want.mean() < 1
