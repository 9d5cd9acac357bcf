"""Publishing's ranking helpers (lshjob/index/_ranking.py). Oracle: Python's sorted() with the
key (src, -jaccard, neighbour) and a cut of each src's list, written independently."""

from __future__ import annotations

from itertools import groupby

import numpy as np

from lshjob.index._ranking import gathered, ranks, top_rows


def test_top_rows_rank_each_list_and_cut_it_with_ties_by_neighbour():
    rng = np.random.default_rng(9)
    n = 20_000
    src = rng.integers(100, 400, n)
    jaccard = rng.integers(1, 6, n) / 5.0  # few values: many ties
    neighbour = rng.permutation(10 * n)[:n]  # distinct, so the order is total
    cap = 7
    got = top_rows(src, jaccard, neighbour, 100, 300, cap)
    # oracle: sort every row, keep the first cap of each src
    ordered = sorted(range(n), key=lambda i: (src[i], -jaccard[i], neighbour[i]))
    want = [i for _, rows in groupby(ordered, key=lambda i: src[i]) for i in list(rows)[:cap]]
    assert got.tolist() == want


def test_gathered_and_ranks():
    ids, at = gathered(np.array([5, 6, 7]), np.array([10, 0, 3]), np.array([2, 0, 3]))
    # oracle: the lists written out by hand
    assert ids.tolist() == [5, 5, 7, 7, 7] and at.tolist() == [10, 11, 3, 4, 5]
    assert ranks(np.array([4, 4, 4, 9, 2, 2])).tolist() == [1, 2, 3, 1, 1, 2]
