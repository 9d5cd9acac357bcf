"""Pairs that can enter no top-k list are left out before their estimates
(lshjob/index/_ranking.py pairs_in_lists, lshjob/index/verify/local.py). Oracle: the whole index
written out by brute force with Python's sorted(): each entity's rows (its group's other members
at 1.0, every member of each partner's group at the pair's Jaccard) ranked by (-jaccard,
neighbour) and cut at top_k; the index from the pairs kept must equal the index from all."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.index._ranking import list_cuts, pairs_in_lists
from lshjob.index.publish import expand, neighbour_blocks
from lshjob.index.verify.base import VerifySettings
from lshjob.index.verify.local import verify_blocks
from lshjob.runtime.partitions import HeldSets
from lshjob.sign.signatures import SignatureParams


def _groups(rng, n):
    """rep_of: entity -> the smallest id of its group of identical sets (groups of 1-9)."""
    rep_of = np.arange(n)
    e = 0
    while e < n:
        size = int(rng.choice([1, 1, 1, 2, 3, 9]))
        rep_of[e:e + size] = e
        e += size
    return rep_of


def _brute_index(left, right, jaccard, rep_of, top_k):
    """{entity: [(neighbour, jaccard), ...]} by brute force (module docstring)."""
    members = {}
    for e, r in enumerate(rep_of.tolist()):
        members.setdefault(r, []).append(e)
    partners = {}
    for a, b, j in zip(left.tolist(), right.tolist(), jaccard.tolist()):
        partners.setdefault(a, []).append((b, j))
        partners.setdefault(b, []).append((a, j))
    index = {}
    for e, r in enumerate(rep_of.tolist()):
        rows = [(m, 1.0) for m in members[r] if m != e]
        rows += [(m, j) for s, j in partners.get(r, []) for m in members[s]]
        ranked = sorted(rows, key=lambda row: (-row[1], row[0]))[:top_k]
        if ranked:
            index[e] = ranked
    return index


def _cut_rule(left, right, jaccard, sizes, top_k, cutoffs=None, ties=True):
    """The rule of pairs_in_lists in Python (sorted()): per side, its partners' rows
    (min(top_k + 1, group size) each) and its own group's rows at 1.0, by Jaccard descending;
    the cut is the value at which top_k + 1 rows are reached (-1.0 when the side never gets
    there, 1.0 when its own group does). A pair is kept by a side when its Jaccard is above
    the cut, or at it and its partner among the smallest partner ids at the cut that the rows
    above leave room for (every pair at a cut of -1.0 or 1.0; every pair at the cut with
    ``ties`` False); a pair kept by either side is kept. ``cutoffs``: a dict filled with each
    side's value."""
    cap = top_k + 1
    sides = {}
    for p, (a, b) in enumerate(zip(left.tolist(), right.tolist())):
        sides.setdefault(a, []).append((p, b))
        sides.setdefault(b, []).append((p, a))
    keep = [False] * len(left)
    for g, pairs in sides.items():
        own = min(cap, int(sizes[g])) if sizes[g] > 1 else 0
        held, cutoff = own, 1.0 if own >= cap else -1.0
        if own < cap:
            for p, other in sorted(pairs, key=lambda x: -jaccard[x[0]]):
                held += min(cap, int(sizes[other]))
                if held >= cap:
                    cutoff = jaccard[p]
                    break
        if cutoffs is not None:
            cutoffs[g] = cutoff
        winners = None
        if ties and -1.0 < cutoff < 1.0:
            room = cap - own - sum(min(cap, int(sizes[o])) for p, o in pairs if jaccard[p] > cutoff)
            winners = set(sorted(o for p, o in pairs if jaccard[p] == cutoff)[:room])
        for p, other in pairs:
            at_cut_kept = jaccard[p] == cutoff and (winners is None or other in winners)
            keep[p] = keep[p] or bool(jaccard[p] > cutoff) or at_cut_kept
    return keep


def _random_pairs(seed: int, n: int, draws: int, top_value: int):
    """Groups of identical sets over n entities, pairs of their representatives drawn at
    random, each pair once, with Jaccard of few values (ties at the cut): (rep_of, left, right,
    jaccard, group sizes)."""
    rng = np.random.default_rng(seed)
    rep_of = _groups(rng, n)
    reps = np.unique(rep_of)
    a, b = rng.choice(reps, draws), rng.choice(reps, draws)
    key = np.unique(np.minimum(a, b)[a != b] * n + np.maximum(a, b)[a != b])
    left, right = key // n, key % n
    jaccard = rng.integers(5, top_value, len(left)) / 10.0
    return rep_of, left, right, jaccard, np.bincount(rep_of, minlength=n)


def test_the_pairs_kept_publish_the_same_index_as_all_pairs():
    n, top_k = 400, 4
    rep_of, left, right, jaccard, sizes = _random_pairs(11, n, 6000, 10)
    keep = pairs_in_lists(left, right, jaccard, sizes, top_k)
    assert 0 < keep.sum() < len(keep) // 2  # the cut leaves out most pairs here
    assert keep.tolist() == _cut_rule(left, right, jaccard, sizes, top_k)
    # Jaccard of five values: many pairs tie at a side's cut, and fewer are kept than all of those
    assert keep.sum() < sum(_cut_rule(left, right, jaccard, sizes, top_k, ties=False))
    want = _brute_index(left, right, jaccard, rep_of, top_k)
    assert _brute_index(left[keep], right[keep], jaccard[keep], rep_of, top_k) == want
    # and publishing from the kept pairs gives that index too (oracle: the brute force above)
    verified = pl.DataFrame({"left_rep": left[keep], "right_rep": right[keep], "jaccard": jaccard[keep],
                             "estimate": jaccard[keep], "bands_shared": np.ones(int(keep.sum()), dtype=np.int32)})
    keys = pl.Series("entity", np.arange(n))
    table = pl.concat(list(neighbour_blocks(expand(verified, rep_of, top_k, 3), keys, 1000)))
    got = {}
    for e, m, j in table.select("entity", "neighbour", "jaccard").iter_rows():
        got.setdefault(e, []).append((m, j))
    assert got == want


def _random_sets(rng, n):
    elements = [np.unique(rng.integers(0, 12, int(rng.integers(2, 7)))) for _ in range(n)]
    offsets = np.concatenate([[0], np.cumsum([len(s) for s in elements])]).astype(np.int64)
    return (ElementSets(pl.Series("entity", np.arange(n)), offsets, np.concatenate(elements).astype(np.int64)),
            [set(s.tolist()) for s in elements])


def test_verification_with_top_k_keeps_what_the_lists_need_in_one_range_and_in_three():
    rng = np.random.default_rng(5)
    n, top_k, threshold = 240, 2, 0.3
    sets, python_sets = _random_sets(rng, n)
    pairs = [(a, b) for a in range(n) for b in range(a + 1, n) if rng.random() < 0.2]
    candidates = pl.DataFrame({"left_rep": [p[0] for p in pairs], "right_rep": [p[1] for p in pairs],
                               "bands_shared": np.ones(len(pairs), dtype=np.int32)},
                              schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "bands_shared": pl.Int32})
    rep_of = np.arange(n)
    sizes = np.ones(n, dtype=np.int64)
    # oracle: exact Jaccard with Python sets, every candidate over the threshold
    exact = {(a, b): len(python_sets[a] & python_sets[b]) / len(python_sets[a] | python_sets[b]) for a, b in pairs}
    over = {p: j for p, j in exact.items() if j >= threshold}
    left, right = np.array([p[0] for p in over]), np.array([p[1] for p in over])
    want = _brute_index(left, right, np.array(list(over.values())), rep_of, top_k)
    params = SignatureParams(perms=16, seed=3)

    class Ranges:  # the sets held in consecutive ranges of entity ids
        def __init__(self, cuts):
            bounds = [0, *cuts, n]
            self.ranges = [(lo, hi - 1) for lo, hi in zip(bounds[:-1], bounds[1:])]

        def load(self, i):
            lo, hi = self.ranges[i][0], self.ranges[i][1] + 1
            return ElementSets(sets.keys[lo:hi], sets.offsets[lo:hi + 1] - sets.offsets[lo],
                               sets.elements[sets.offsets[lo]:sets.offsets[hi]])

    with tempfile.TemporaryDirectory() as tmp:
        whole = Path(tmp) / "candidates.parquet"
        candidates.write_parquet(whole)
        blocks = Path(tmp) / "blocks"
        three = Ranges([80, 160])
        for i, (lo_i, hi_i) in enumerate(three.ranges):
            for j, (lo_j, hi_j) in enumerate(three.ranges[i:], start=i):
                part = candidates.filter(pl.col("left_rep").is_between(lo_i, hi_i)
                                         & pl.col("right_rep").is_between(lo_j, hi_j))
                folder = blocks / f"left_part={i}" / f"right_part={j}"
                folder.mkdir(parents=True)
                part.write_parquet(folder / "0.parquet")
        for path, store in ((whole, HeldSets(sets)), (blocks, three)):
            tally: dict = {}
            settings = VerifySettings(top_k=top_k, group_sizes=sizes, tally=tally)
            verified = verify_blocks(path, store, threshold, params, settings)
            assert tally["over_threshold"] == len(over)  # oracle: the Python sets above
            assert verified.height < len(over)
            assert all(over[(a, b)] == j for a, b, j in verified.select("left_rep", "right_rep", "jaccard").iter_rows())
            table = pl.concat(list(neighbour_blocks(expand(verified, rep_of, top_k, 3),
                                                    pl.Series("entity", np.arange(n)), 1000)))
            got = {}
            for e, m, j in table.select("entity", "neighbour", "jaccard").iter_rows():
                got.setdefault(e, []).append((m, j))
            assert got == want


def test_each_sides_cut_is_the_value_its_list_fills_at_and_a_floor_for_more_pairs():
    """list_cuts' cuts against the Python rule (_cut_rule), and the floor they give: the
    cuts of some of the pairs are at most those of all of them, and a pair below both its
    sides' cuts from some pairs is not kept with all of them."""
    top_k = 3
    rep_of, left, right, jaccard, sizes = _random_pairs(5, 300, 5000, 11)
    rng = np.random.default_rng(5)
    want = {}
    keep_want = _cut_rule(left, right, jaccard, sizes, top_k, want)
    keep, cuts = list_cuts(left, right, jaccard, sizes, top_k)
    assert keep.tolist() == keep_want
    assert {g: cuts[g] for g in want} == want
    assert (cuts[sizes > top_k] == 1.0).all()  # a group filling its own list
    assert sorted(set(want.values()) - {-1.0, 1.0})  # cuts of several values are checked
    some = rng.random(len(left)) < 0.4
    _, floors = list_cuts(left[some], right[some], jaccard[some], sizes, top_k)
    assert (floors <= cuts).all()
    below = (jaccard < floors[left]) & (jaccard < floors[right])
    assert below.sum() > 0 and not keep[below].any()
    # a pair left out of some pairs (below both cuts, or behind the ties at one) is left out of all
    kept_some = pairs_in_lists(left[some], right[some], jaccard[some], sizes, top_k)
    dropped = np.flatnonzero(some)[~kept_some]
    assert len(dropped) > 0 and not keep[dropped].any()


def test_pairs_laid_out_by_side_in_tasks_are_a_stable_sort_of_both_sides():
    """lshjob/index/_ranking.py _by_side, in 1, 2 and 3 tasks. Oracle: numpy's stable argsort of
    each pair's two sides (left then right, pairs in order), and a count of each side for the
    starts; the tasks share a side's slots out in their order, so every count of tasks gives
    the one layout."""
    from lshjob.index._ranking import _by_side

    rng = np.random.default_rng(8)
    groups, n = 5000, 40_001
    left = rng.integers(0, groups - 1, size=n)
    right = np.minimum(groups - 1, left + 1 + rng.zipf(1.5, size=n) % 300)  # popular sides: long runs
    sides = np.empty(2 * n, dtype=np.int64)
    sides[0::2], sides[1::2] = left, right
    starts = np.concatenate([[0], np.cumsum(np.bincount(sides, minlength=groups))])
    pair = np.argsort(sides, kind="stable") // 2
    for tasks in (1, 2, 3):
        got_starts, got_pair = _by_side(left, right, groups, tasks)
        assert np.array_equal(got_starts, starts) and np.array_equal(got_pair, pair)
