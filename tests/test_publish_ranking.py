"""Publishing's ranking helpers (lshjob/index/_ranking.py). Oracle: Python's sorted() with the
key (src, -jaccard, neighbour) and a cut of each src's list, written independently."""

from __future__ import annotations

from itertools import groupby

import numpy as np

from lshjob.index._ranking import by_value, edges_that_count, gathered, ranks, top_rows


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


def test_by_value_is_a_stable_sort():
    values = np.random.default_rng(2).integers(0, 50, 3000)
    # oracle: numpy's stable argsort
    assert by_value(values, 50).tolist() == np.argsort(values, kind="stable").tolist()


def test_edges_that_count_keep_every_edge_at_or_above_the_cut():
    # one list (src 0) of cap 5 with 2 rows of its own group: edges of weights 2, 1, 3, 1 at
    # Jaccard 0.9, 0.8, 0.8, 0.6: 2 + 2 = 4 rows above 0.8, the 5th row at 0.8, so both edges
    # at 0.8 stay (their ties go by neighbour later) and the one at 0.6 goes; worked by hand
    keep = edges_that_count(np.zeros(4, dtype=np.int64), np.array([0.9, 0.8, 0.8, 0.6]), np.array([2, 1, 3, 1]),
                            np.array([2]), 0, 1, 5)
    assert keep.tolist() == [True, True, True, False]
    # a group of its own filling the list: no edge can enter
    assert not edges_that_count(np.zeros(2, dtype=np.int64), np.array([0.9, 0.7]), np.array([1, 1]),
                                np.array([5]), 0, 1, 5).any()
