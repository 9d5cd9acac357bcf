"""Verification deduplicating as rows come (lshjob/index/verify/local.py, HeldRows): a pair the
join wrote a row per band for, and met again in crowds, is verified once with its rows counted,
whatever the slice; the rows held stay within the documented bound.

Oracles: exact Jaccard with Python sets; a pair's ``bands_shared`` counted with
``collections.Counter`` over the candidate rows plus the crowds that hold both sides.
"""

from __future__ import annotations

from collections import Counter
from itertools import combinations

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.index.verify.base import VerifySettings
from lshjob.index.verify.local import FRESH_SHARE, HeldRows, one_row_a_pair, verify_blocks
from lshjob.runtime.partitions import HeldSets


def _sets(rng, n):
    # few elements, so that many pairs reach the threshold
    elements = [np.unique(rng.integers(0, 10, int(rng.integers(2, 6)))) for _ in range(n)]
    offsets = np.concatenate([[0], np.cumsum([len(s) for s in elements])]).astype(np.int64)
    return (ElementSets(pl.Series("entity", np.arange(n)), offsets, np.concatenate(elements).astype(np.int64)),
            [set(s.tolist()) for s in elements])


def test_rows_per_band_and_crowds_verified_once_whatever_the_slice(tmp_path):
    rng = np.random.default_rng(8)
    n, threshold = 160, 0.4
    sets, python_sets = _sets(rng, n)
    # a row per band a pair met in: 1-4 rows for a fifth of all pairs, shuffled
    rows = [(a, b) for a, b in combinations(range(n), 2) if rng.random() < 0.2 for _ in range(int(rng.integers(1, 5)))]
    rng.shuffle(rows)
    candidates = pl.DataFrame({"left_rep": [a for a, _ in rows], "right_rep": [b for _, b in rows],
                               "bands_shared": np.ones(len(rows), dtype=np.int32)},
                              schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "bands_shared": pl.Int32})
    path = tmp_path / "candidates.parquet"
    candidates.write_parquet(path)
    # crowds (CROWDS: sorted by crowd then rep), a rep in two of them
    members = [sorted(rng.choice(n, 12, replace=False).tolist()) for _ in range(3)]
    members[1] = sorted(set(members[1]) | {members[0][0]})
    crowds = pl.DataFrame({"crowd": [c for c, m in enumerate(members) for _ in m],
                           "rep": [r for m in members for r in m]}, schema={"crowd": pl.Int64, "rep": pl.Int64})
    crowd_path = tmp_path / "crowds.parquet"
    crowds.write_parquet(crowd_path)

    # oracle: Counter over the rows and the crowds' pairs; Jaccard by Python sets
    met = Counter(rows) + Counter(pair for m in members for pair in combinations(m, 2))
    want = {}
    for (a, b), count in met.items():
        jac = len(python_sets[a] & python_sets[b]) / len(python_sets[a] | python_sets[b])
        if jac >= threshold:
            want[(a, b)] = (jac, count)
    assert len(want) > 200 and max(c for _, c in want.values()) >= 4

    for step in (7, 100, None):  # many deduplications, a few, one at the end
        settings = VerifySettings(slice_rows=step or 1 << 20, held_rows=step)
        got = verify_blocks(path, HeldSets(sets), threshold, None, settings, crowd_path)
        assert got.height == len(want)
        table = {(a, b): (j, s) for a, b, j, s in got.select("left_rep", "right_rep", "jaccard", "bands_shared")
                 .iter_rows()}
        assert table.keys() == want.keys()
        for pair, (jac, count) in want.items():
            assert table[pair][0] == jac and table[pair][1] == count, (step, pair)


def test_held_rows_stay_within_the_bound_or_the_pairs_kept_and_a_share_of_it():
    # Oracle: the bound in HeldRows' docstring (the rows kept and new at most the bound, or the
    # rows kept and a FRESH_SHARE of the bound, plus a piece), counted by a spy on what each
    # deduplication is given; the result against one_row_a_pair over all rows at once.
    rng = np.random.default_rng(2)
    pairs = rng.integers(0, 3000, size=(400, 2))
    pairs = np.unique(np.sort(pairs, axis=1)[pairs[:, 0] != pairs[:, 1]], axis=0)
    given = []

    def spy(frame):
        given.append(frame.height)
        return one_row_a_pair(frame)

    step = 50
    held = HeldRows(step, spy)
    batches = []
    for _ in range(60):  # each batch: 30 rows of pairs drawn again and again
        pick = pairs[rng.integers(0, len(pairs), 30)]
        batch = pl.DataFrame({"left_rep": pick[:, 0], "right_rep": pick[:, 1], "jaccard": np.full(30, 0.5),
                              "bands_shared": np.ones(30, dtype=np.int32)})
        batches.append(batch)
        held.add(batch)
    result = held.result().sort("left_rep", "right_rep")
    whole = one_row_a_pair(pl.concat(batches)).sort("left_rep", "right_rep")
    assert result.equals(whole)
    assert len(given) > 3
    assert max(given) <= max(step, len(pairs) + step // FRESH_SHARE) + 30
    assert len(pairs) > 4 * step  # the pairs kept pass the bound: the second case of the rule is met


def _cut_rule(want: dict, sizes: np.ndarray, top_k: int) -> set:
    """The pairs the top-k cut keeps, by its rule in Python (sorted()): per side, its partners'
    rows (min(top_k + 1, group size) each) and its own group's rows at 1.0, by Jaccard
    descending; the cut is the value where top_k + 1 rows are reached. A pair is kept by a
    side when its Jaccard is above the cut, or at it and its partner among the smallest
    partner ids there that the rows above leave room for (every pair at a cut of 1.0, and
    every pair when the rows are never reached), by either side."""
    cap, sides, kept = top_k + 1, {}, set()
    for (a, b), (jac, _) in want.items():
        sides.setdefault(a, []).append((jac, b, (a, b)))
        sides.setdefault(b, []).append((jac, a, (a, b)))
    for g, pairs in sides.items():
        held = min(cap, int(sizes[g])) if sizes[g] > 1 else 0
        cutoff = 1.0 if held >= cap else -1.0
        for jac, other, _ in sorted(pairs, key=lambda x: -x[0]):
            if held >= cap:
                break
            held += min(cap, int(sizes[other]))
            if held >= cap:
                cutoff = jac
        own = min(cap, int(sizes[g])) if sizes[g] > 1 else 0
        winners = None
        if -1.0 < cutoff < 1.0:
            room = cap - own - sum(min(cap, int(sizes[other])) for jac, other, _ in pairs if jac > cutoff)
            winners = set(sorted(other for jac, other, _ in pairs if jac == cutoff)[:room])
        kept |= {pair for jac, other, pair in pairs
                 if jac > cutoff or (jac == cutoff and (winners is None or other in winners))}
    return kept


def test_the_top_k_cut_while_rows_come_keeps_the_pairs_and_counts_of_one_cut_at_the_end(tmp_path):
    # Oracle: the pairs reaching the threshold by Python sets, their rows counted with Counter,
    # cut by the rule above; the rows held checked by a spy on what each cut is given.
    rng = np.random.default_rng(5)
    n, threshold, top_k = 150, 0.3, 3
    sets, python_sets = _sets(rng, n)
    rows = [(a, b) for a, b in combinations(range(n), 2) if rng.random() < 0.3 for _ in range(int(rng.integers(1, 5)))]
    rng.shuffle(rows)
    path = tmp_path / "candidates.parquet"
    pl.DataFrame({"left_rep": [a for a, _ in rows], "right_rep": [b for _, b in rows],
                  "bands_shared": np.ones(len(rows), dtype=np.int32)},
                 schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "bands_shared": pl.Int32}).write_parquet(path)
    sizes = rng.choice([1, 1, 1, 2, 5], n)  # members of each representative's group
    met, want = Counter(rows), {}
    for (a, b), count in met.items():
        jac = len(python_sets[a] & python_sets[b]) / len(python_sets[a] | python_sets[b])
        if jac >= threshold:
            want[(a, b)] = (jac, count)
    kept = _cut_rule(want, sizes, top_k)
    assert 0 < len(kept) < len(want) // 2  # the cut leaves out most pairs here
    for step in (40, None):  # cuts as rows come, one cut at the end
        settings = VerifySettings(slice_rows=step or 1 << 20, held_rows=step, top_k=top_k, group_sizes=sizes,
                                  tally={})
        got = verify_blocks(path, HeldSets(sets), threshold, None, settings)
        table = {(a, b): (j, s) for a, b, j, s in got.select("left_rep", "right_rep", "jaccard", "bands_shared")
                 .iter_rows()}
        assert table.keys() == kept, step
        assert all(table[pair] == want[pair] for pair in kept), step
        assert settings.tally["over_threshold"] >= len(want)


def test_rows_deduplicated_by_packed_keys_keep_each_pairs_exact_jaccard_and_bands():
    """one_row_a_pair given the set sizes (a key of pair, intersection and bands) against the
    same rows grouped by polars, and the Jaccard against Python's division of the exact
    intersection and union (Python sets)."""
    rng = np.random.default_rng(4)
    sets = [set(rng.integers(0, 40, int(rng.integers(1, 30))).tolist()) for _ in range(300)]
    offsets = np.concatenate([[0], np.cumsum([len(s) for s in sets])]).astype(np.int64)
    pairs = np.unique(np.sort(rng.integers(0, 300, size=(3000, 2)), axis=1), axis=0)
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    pick = pairs[rng.integers(0, len(pairs), 8000)]  # pairs met in several rows
    jac = np.array([len(sets[a] & sets[b]) / len(sets[a] | sets[b]) for a, b in pick])
    rows = pl.DataFrame({"left_rep": pick[:, 0], "right_rep": pick[:, 1], "jaccard": jac,
                         "bands_shared": rng.integers(1, 5, len(pick)).astype(np.int32)})
    got = one_row_a_pair(rows, held_sets=(offsets, 0, offsets, 0)).sort("left_rep", "right_rep")
    want = (rows.group_by("left_rep", "right_rep").agg(pl.col("jaccard").first(), pl.col("bands_shared").sum())
            .select(rows.columns).sort("left_rep", "right_rep"))
    assert got.height < rows.height  # pairs were repeated
    assert got.equals(want)
    assert got["jaccard"].to_list() == [len(sets[a] & sets[b]) / len(sets[a] | sets[b])
                                        for a, b in got.select("left_rep", "right_rep").iter_rows()]


def test_packed_keys_cap_an_intersection_too_large_for_the_bits_left():
    """Ids of 30 bits and bands of 3 leave the intersection one bit of the key: intersections
    of 1 and more are capped, and those pairs' Jaccard taken from ``jaccard_of`` (here Python
    sets, the oracle), the same rows as polars' group_by."""
    rng = np.random.default_rng(5)
    first = 1 << 29
    sets = [set(rng.integers(0, 12, int(rng.integers(1, 8))).tolist()) for _ in range(200)]
    offsets = np.concatenate([[0], np.cumsum([len(s) for s in sets])]).astype(np.int64)
    pairs = np.unique(np.sort(rng.integers(0, 200, size=(2000, 2)), axis=1), axis=0)
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    pick = pairs[rng.integers(0, len(pairs), 5000)]

    def python_jaccard(left, right):
        return np.array([len(sets[a - first] & sets[b - first]) / len(sets[a - first] | sets[b - first])
                         for a, b in zip(left, right)])

    rows = pl.DataFrame({"left_rep": pick[:, 0] + first, "right_rep": pick[:, 1] + first,
                         "jaccard": python_jaccard(pick[:, 0] + first, pick[:, 1] + first),
                         "bands_shared": rng.integers(1, 5, len(pick)).astype(np.int32)})
    asked = []
    got = one_row_a_pair(rows, jaccard_of=lambda a, b: asked.append(len(a)) or python_jaccard(a, b),
                         held_sets=(offsets, first, offsets, first)).sort("left_rep", "right_rep")
    want = (rows.group_by("left_rep", "right_rep").agg(pl.col("jaccard").first(), pl.col("bands_shared").sum())
            .select(rows.columns).sort("left_rep", "right_rep"))
    assert got.equals(want)
    assert 0 < asked[0] < got.height  # only the capped pairs were asked again
