"""Verification of crowds (lshjob/index/verify/_crowds.py): every pair of a crowd's members
whose exact Jaccard reaches the threshold, found by prefix filtering within the crowd or by
counting shared elements (each way forced, and chosen by cost).
Oracle: exact Jaccard of every pair of members with Python sets (itertools.combinations)."""

from __future__ import annotations

from collections import Counter
from itertools import combinations

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.index._ranking import own_cuts, pairs_in_lists
from lshjob.index.verify._crowd_index import _rarity
from lshjob.index.verify._crowds import crowd_pairs_between, crowd_pieces, verify_crowds


def _crowded_sets(seed: int, crowds: int = 6):
    """Long-tailed little sets: each crowd's members hold its popular element (one or two of
    them, as a bucket of small sets of popular elements does) and a few others drawn from a
    skewed catalogue, so pairs sharing one, two or more elements are all there; a few
    members hold only the common elements."""
    rng = np.random.default_rng(seed)
    sets, crowd_rows = [], []
    for c in range(crowds):
        common = [1000 + c] if c % 2 else [1000 + c, 2000 + c]
        for _ in range(int(rng.integers(20, 70))):
            extra = int(min(rng.lognormal(1.0, 0.9), 14))
            others = set(int(x) for x in rng.zipf(1.6, extra) % 60)
            s = sorted(set(common) | others)
            crowd_rows.append((c + 1, len(sets)))
            sets.append(s)
    # a set in two crowds, and identical members of one crowd
    crowd_rows.append((2, 0))
    sets.append(list(sets[-1]))
    crowd_rows.append((crowds, len(sets) - 1))
    # members of crowds 1 and 3 met again in one more crowd (another band): pairs in several crowds
    crowd_rows.extend((crowds + 1, rep) for crowd, rep in list(crowd_rows) if crowd in (1, 3))
    return sets, crowd_rows


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.8])
@pytest.mark.parametrize("with_bands", [False, True, "past 64"])
@pytest.mark.parametrize("how", ["prefix", "counted", "auto"])
def test_crowd_pairs_are_exactly_those_reaching_the_threshold(seed, threshold, with_bands, how):
    sets, crowd_rows = _crowded_sets(seed)
    keys = pl.Series("entity", np.arange(len(sets)))
    rows = pl.DataFrame({"entity": np.repeat(np.arange(len(sets)), [len(s) for s in sets]),
                         "element": np.concatenate([np.array(s) for s in sets])})
    element_sets = ElementSets.from_sets(rows)
    assert element_sets.keys.equals(keys)
    table = (pl.DataFrame(crowd_rows, schema={"crowd": pl.Int64, "rep": pl.Int64}, orient="row")
             .unique().sort("crowd", "rep"))
    if with_bands:  # crowd c in band c - 1 (one crowd a band: a rep is in one crowd a band at most)
        # "past 64": bands 60.. on, so a crowd's bands pass 64, where their bits wrap around
        table = table.with_columns(band=(pl.col("crowd") - 1 + (60 if with_bands == "past 64" else 0)).cast(pl.Int32))
    block = crowd_pairs_between(table, (0, len(sets) - 1), (0, len(sets) - 1))
    got = verify_crowds(block, element_sets, 0, element_sets, 0, threshold, max_pairs=500, how=how)
    # oracle: exact Jaccard with Python sets, every pair of every crowd; a row per crowd it is
    # in, or, given the bands, one row with the number of crowds it is in
    crowds_in = Counter()
    for _, members in table.group_by("crowd"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            sa, sb = set(sets[a]), set(sets[b])
            if len(sa & sb) / len(sa | sb) >= threshold:
                crowds_in[a, b] += 1
    jaccard = {(a, b): len(set(sets[a]) & set(sets[b])) / len(set(sets[a]) | set(sets[b])) for a, b in crowds_in}
    if with_bands:
        want = sorted((a, b, jaccard[a, b], n) for (a, b), n in crowds_in.items())
    else:
        want = sorted((a, b, jaccard[a, b], 1) for (a, b), n in crowds_in.items() for _ in range(n))
    got_rows = sorted(zip(got["left_rep"].to_list(), got["right_rep"].to_list(), got["jaccard"].to_list(),
                          got["bands_shared"].to_list()))
    assert len(want) > 20  # the case holds pairs to find
    assert any(n > 1 for n in crowds_in.values())  # and pairs met in more than one crowd
    assert got_rows == want


@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize("how", ["prefix", "counted", "auto"])
def test_crowd_pairs_below_both_floors_are_not_sought(seed, how):
    """With top-k floors (lshjob.index._ranking.list_cuts), every pair reaching
    max(threshold, min(floor a, floor b)) is found with its exact Jaccard and its crowds, and
    none below the threshold. Oracle: exact Jaccard with Python sets, as above."""
    sets, crowd_rows = _crowded_sets(seed)
    rows = pl.DataFrame({"entity": np.repeat(np.arange(len(sets)), [len(s) for s in sets]),
                         "element": np.concatenate([np.array(s) for s in sets])})
    element_sets = ElementSets.from_sets(rows)
    table = (pl.DataFrame(crowd_rows, schema={"crowd": pl.Int64, "rep": pl.Int64}, orient="row")
             .unique().sort("crowd", "rep").with_columns(band=(pl.col("crowd") - 1).cast(pl.Int32)))
    threshold = 0.3
    rng = np.random.default_rng(seed)
    floors = np.where(rng.random(len(sets)) < 0.7, rng.choice([0.4, 0.5, 0.6, 1.0], len(sets)), -1.0)
    floors[table.filter(pl.col("crowd") == 2)["rep"].to_numpy()] = 0.5  # one crowd floored throughout
    block = crowd_pairs_between(table, (0, len(sets) - 1), (0, len(sets) - 1))
    got = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, threshold, max_pairs=500,
                                      floors=lambda: floors, how=how)))
    crowds_in, jaccard = Counter(), {}
    for _, members in table.group_by("crowd"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            sa, sb = set(sets[a]), set(sets[b])
            jaccard[a, b] = len(sa & sb) / len(sa | sb)
            crowds_in[a, b] += 1
    sought = {p for p, j in jaccard.items() if j >= max(threshold, min(floors[p[0]], floors[p[1]]))}
    got_rows = {(a, b): (j, n) for a, b, j, n in got.select("left_rep", "right_rep", "jaccard", "bands_shared")
                .iter_rows()}
    assert got.height == len(got_rows)  # a row a pair
    assert sought <= set(got_rows)
    assert all(jaccard[p] >= threshold and got_rows[p] == (jaccard[p], crowds_in[p]) for p in got_rows)
    skipped = {p for p, j in jaccard.items() if j >= threshold} - set(got_rows)
    assert len(skipped) > 10  # the floors left pairs out


@pytest.mark.parametrize("how", ["prefix", "counted", "auto"])
def test_a_crowd_finding_more_pairs_than_its_room_keeps_that_many_and_is_counted(how):
    # Oracle: exact Jaccard with Python sets. Crowd 1: 40 near-copies (every pair similar, 780
    # pairs) with room for 100; crowd 2: 30 sets whose pairs reach the threshold rarely, untouched.
    rng = np.random.default_rng(5)
    base = list(range(100, 140))
    sets = [sorted(set(base) - {int(rng.integers(100, 140))}) for _ in range(40)]
    sets += [sorted({7} | set(int(x) for x in rng.integers(200, 260, 3))) for _ in range(30)]
    rows = pl.DataFrame({"entity": np.repeat(np.arange(len(sets)), [len(s) for s in sets]),
                         "element": np.concatenate([np.array(s) for s in sets])})
    element_sets = ElementSets.from_sets(rows)
    table = pl.DataFrame({"crowd": [1] * 40 + [2] * 30, "rep": np.arange(70)})
    block = crowd_pairs_between(table, (0, 69), (0, 69))
    truth = {(a, b) for lo, hi in ((0, 40), (40, 70)) for a, b in combinations(range(lo, hi), 2)
             if len(set(sets[a]) & set(sets[b])) / len(set(sets[a]) | set(sets[b])) >= 0.5}
    tally: dict = {}
    got = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, 0.5, tally=tally, room=100, how=how)))
    pairs = set(zip(got["left_rep"].to_list(), got["right_rep"].to_list()))
    first = {p for p in pairs if p[1] < 40}
    assert len(first) == 100 and first <= truth  # room for 100: the first 100 found, each right
    assert {p for p in truth if p[0] >= 40} == pairs - first  # the other crowd whole
    assert tally == {"crowds_cut": 1}
    whole: dict = {}
    every = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, 0.5, tally=whole, how=how)))
    assert set(zip(every["left_rep"].to_list(), every["right_rep"].to_list())) == truth and whole == {}


def _distinct_crowds(seed: int):
    """:func:`_crowded_sets` with each set once, as representatives are (lshjob/index/collapse.py):
    a repeated set's crowd rows go to its first holder. Crowd c in band c - 1."""
    sets, crowd_rows = _crowded_sets(seed)
    first, ids = {}, []
    for s in sets:
        ids.append(first.setdefault(tuple(s), len(first)))
    distinct = [list(s) for s in first]
    rows = pl.DataFrame({"entity": np.repeat(np.arange(len(distinct)), [len(s) for s in distinct]),
                         "element": np.concatenate([np.array(s) for s in distinct])})
    table = (pl.DataFrame([(c, ids[r]) for c, r in crowd_rows], schema={"crowd": pl.Int64, "rep": pl.Int64},
                          orient="row")
             .unique().sort("crowd", "rep").with_columns(band=(pl.col("crowd") - 1).cast(pl.Int32)))
    return distinct, ElementSets.from_sets(rows), table


def _every_pair(sets, table, threshold):
    """Oracle: exact Jaccard with Python sets of every pair of every crowd reaching ``threshold``."""
    found = {}
    for _, members in table.group_by("crowd"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            j = len(set(sets[a]) & set(sets[b])) / len(set(sets[a]) | set(sets[b]))
            if j >= threshold:
                found[a, b] = j
    return found


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.6])
@pytest.mark.parametrize("how", ["prefix", "counted", "auto"])
def test_distinct_members_of_one_size_spared_lose_no_pair(seed, threshold, how):
    """``distinct=True`` skips pairs of one size whose bound (|A| - 1) / (|A| + 1) is below the
    threshold: the same pairs and values as the oracle (exact Jaccard, Python sets)."""
    sets, element_sets, table = _distinct_crowds(seed)
    block = crowd_pairs_between(table, (0, len(sets) - 1), (0, len(sets) - 1))
    got = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, threshold, distinct=True, how=how)))
    want = _every_pair(sets, table, threshold)
    assert len(want) > 20
    assert {(a, b): j for a, b, j in got.select("left_rep", "right_rep", "jaccard").iter_rows()} == want
    assert got.height == len(want)


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("how", ["prefix", "counted", "auto"])
def test_floors_a_crowd_raises_drop_only_pairs_no_list_takes(seed, how):
    """With top-k floors, group sizes and top_k, a crowd raises its members' floors with the
    pairs it finds (lshjob/index/verify/_crowd_members.py rise): fewer rows, and the pairs
    the top-k cut keeps (lshjob.index._ranking.pairs_in_lists) are those it keeps from every
    pair of the oracle (exact Jaccard, Python sets), with the same values."""
    sets, element_sets, table = _distinct_crowds(seed)
    rng = np.random.default_rng(seed)
    group_sizes = rng.choice([1, 1, 1, 2, 3], len(sets))
    group_sizes[0] = 5  # a group that fills its list alone (floor 1.0)
    top_k, threshold = 3, 0.3
    floors = own_cuts(group_sizes, top_k)
    block = crowd_pairs_between(table, (0, len(sets) - 1), (0, len(sets) - 1))
    got = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, threshold, floors=lambda: floors,
                                      group_sizes=group_sizes, top_k=top_k, distinct=True, how=how)))
    lower = pl.concat(list(crowd_pieces(block, element_sets, 0, element_sets, 0, threshold, floors=lambda: floors,
                                        distinct=True, how=how)))  # the given floors only
    want = _every_pair(sets, table, threshold)

    def kept(pairs):
        left, right = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
        keep = pairs_in_lists(left, right, np.array([pairs[p] for p in pairs]), group_sizes, top_k)
        return {p: pairs[p] for p, k in zip(pairs, keep) if k}

    rows = {(a, b): j for a, b, j in got.select("left_rep", "right_rep", "jaccard").iter_rows()}
    assert got.height == len(rows) and all(want[p] == j for p, j in rows.items())
    assert got.height < lower.height  # the floors rose and left pairs out
    assert kept(rows) == kept(want) and len(kept(want)) > 20


@pytest.mark.parametrize("seed", [1, 2])
def test_a_crowds_ranks_count_each_element_and_order_rarest_first_ties_as_met(seed):
    """The crowd index's rarity (``_rarity``: a hash table of the crowd's elements) against
    collections.Counter: each distinct element once, how many members hold it, and its rank
    among (members holding it, place first met in the members' sets in order) ascending. Keys
    span the int64 range, negatives included, and thousands of them, so the table's probes run
    into one another."""
    rng = np.random.default_rng(seed)
    catalogue = np.unique(np.concatenate([rng.integers(-2**63, 2**63 - 1, 3000, dtype=np.int64),
                                          np.arange(-50, 2000, dtype=np.int64) * 4096]))
    sets = []
    for _ in range(400):
        popular = rng.choice(catalogue[:40], size=int(rng.integers(0, 4)), replace=False)
        rest = rng.choice(catalogue, size=int(rng.integers(1, 30)), replace=False)
        sets.append(sorted(set(popular.tolist()) | set(rest.tolist())))
    sets.append(list(sets[0]))  # a member twice: its elements counted for each
    offsets = np.cumsum([0] + [len(s) for s in sets]).astype(np.int64)
    elements = np.array([x for s in sets for x in s], dtype=np.int64)
    members = np.arange(len(sets), dtype=np.int64)[::-1].copy()  # members in any order
    values, freq, rank, size, which = _rarity(offsets, elements, 0, members)
    sets = sets[::-1]
    held = Counter(x for s in sets for x in s)
    flat = [x for s in sets for x in s]
    met = {x: flat.index(x) for x in held}
    order = sorted(held, key=lambda x: (held[x], met[x]))
    assert len(values) == len(held) and list(size) == [len(s) for s in sets]
    assert [int(values[u]) for u in which] == flat
    assert [int(freq[u]) for u in which] == [held[x] for x in flat]
    assert [int(rank[u]) for u in which] == [order.index(x) for x in flat]


def _held(sets, ids):
    """The sets ``ids`` held as one key range's are (set t is entity ids[t])."""
    rows = pl.DataFrame({"entity": np.repeat(ids, [len(sets[i]) for i in ids]),
                         "element": np.concatenate([np.array(sets[i]) for i in ids])})
    return ElementSets.from_sets(rows)


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.8])
def test_crowd_pairs_between_two_ranges_are_exactly_those_reaching_the_threshold(seed, threshold):
    # A run in parts: a crowd's members in two key ranges, each range's sets held apart; the
    # pairs across them are made here (one side in each range), a row per crowd they share.
    # Oracle: exact Jaccard with Python sets of every such pair of every crowd.
    sets, crowd_rows = _crowded_sets(seed)
    middle = len(sets) // 2
    table = (pl.DataFrame(crowd_rows, schema={"crowd": pl.Int64, "rep": pl.Int64}, orient="row")
             .unique().sort("crowd", "rep"))

    left, right = _held(sets, np.arange(middle)), _held(sets, np.arange(middle, len(sets)))
    block = crowd_pairs_between(table, (0, middle - 1), (middle, len(sets) - 1))
    got = verify_crowds(block, left, 0, right, middle, threshold, max_pairs=500)
    want = Counter()
    for _, members in table.group_by("crowd"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            sa, sb = set(sets[a]), set(sets[b])
            if a < middle <= b and len(sa & sb) / len(sa | sb) >= threshold:
                want[a, b, len(sa & sb) / len(sa | sb)] += 1
    got_rows = Counter(zip(got["left_rep"].to_list(), got["right_rep"].to_list(), got["jaccard"].to_list()))
    assert len(want) >= 5 and set(got["bands_shared"]) == {1}
    assert got_rows == want


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_crowd_pairs_between_two_ranges_below_both_floors_are_not_sought(seed):
    # A run in parts, with the top-k floors the blocks before gave: every pair across the two
    # ranges reaching max(threshold, min(floor a, floor b)) is found with its exact Jaccard, a
    # row per crowd it shares, and no pair below that. Oracle: exact Jaccard with Python sets.
    sets, crowd_rows = _crowded_sets(seed)
    middle = len(sets) // 2
    table = (pl.DataFrame(crowd_rows, schema={"crowd": pl.Int64, "rep": pl.Int64}, orient="row")
             .unique().sort("crowd", "rep"))

    threshold = 0.3
    rng = np.random.default_rng(seed)
    floors = np.where(rng.random(len(sets)) < 0.7, rng.choice([0.4, 0.5, 0.6, 1.0], len(sets)), -1.0)
    left, right = _held(sets, np.arange(middle)), _held(sets, np.arange(middle, len(sets)))
    block = crowd_pairs_between(table, (0, middle - 1), (middle, len(sets) - 1))
    got = pl.concat(list(crowd_pieces(block, left, 0, right, middle, threshold, max_pairs=500,
                                      floors=lambda: floors)))
    want, reached = Counter(), 0
    for _, members in table.group_by("crowd"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            sa, sb = set(sets[a]), set(sets[b])
            jaccard = len(sa & sb) / len(sa | sb)
            if a < middle <= b and jaccard >= threshold:
                reached += 1
                if jaccard >= max(threshold, min(floors[a], floors[b])):
                    want[a, b, jaccard] += 1
    got_rows = Counter(zip(got["left_rep"].to_list(), got["right_rep"].to_list(), got["jaccard"].to_list()))
    assert len(want) >= 5 and reached - sum(want.values()) >= 5  # pairs to find, and pairs the floors leave out
    assert got_rows == want
