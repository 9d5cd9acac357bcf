"""Publishing's ranking (lshjob/index/_ranking.py ranked_lists, member_rows; lshjob/index/publish.py
expand, neighbour_blocks). Oracles: Python's sorted() over every row of a list, and a polars
join-and-sort of the whole index, both written independently of the kernels."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from lshjob.index._ranking import ranked_lists
from lshjob.index.publish import expand, neighbour_blocks


def _pairs_and_groups(seed: int, n: int = 300, pairs: int = 900):
    """Groups of identical sets (a few large, many singletons) and verified pairs of their
    representatives with few Jaccard values, so that ties are many."""
    rng = np.random.default_rng(seed)
    rep_of = np.arange(n)
    for start, size in ((10, 40), (80, 5), (120, 2), (200, 60)):
        rep_of[start:start + size] = start
    reps = np.unique(rep_of)
    chosen = {tuple(sorted(rng.choice(reps, 2, replace=False))) for _ in range(pairs)}
    left, right = np.array(sorted(chosen)).T
    jaccard = rng.integers(1, 5, len(left)) / 4.0  # 0.25 .. 1.0: ties, some at 1 beside the groups' own rows
    verified = pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": jaccard,
                             "estimate": rng.uniform(0.2, 1, len(left)),
                             "bands_shared": rng.integers(1, 9, len(left)).astype(np.int32)})
    return verified, rep_of


@pytest.mark.parametrize("cap", [2, 5, 61, 1000])
def test_ranked_lists_are_each_representatives_first_rows_by_jaccard_then_neighbour(cap):
    verified, rep_of = _pairs_and_groups(3)
    n = len(rep_of)
    sizes = np.bincount(rep_of, minlength=n)
    members = {r: sorted(np.flatnonzero(rep_of == r).tolist()) for r in np.unique(rep_of)}
    head_id = np.concatenate([members[r][:cap] for r in sorted(members)]).astype(np.int32)
    head_rep = rep_of[head_id]
    head_first = np.searchsorted(head_rep, np.arange(n))
    starts, neighbour, jaccard, estimate, bands, own = ranked_lists(
        verified["left_rep"].to_numpy(), verified["right_rep"].to_numpy(), verified["jaccard"].to_numpy(),
        verified["estimate"].to_numpy(), verified["bands_shared"].to_numpy(), sizes, head_first, head_id, cap, 7,
        np.int32)
    # oracle: every row of a list made in Python (its own group's first cap members at 1, each
    # pair's partner group's first cap members at the pair's values), sorted, cut at cap
    rows = {r: [(1.0, m, 1.0, 7) for m in members[r][:cap]] if sizes[r] > 1 else [] for r in members}
    for a, b, j, e, s in verified.iter_rows():
        rows[a] += [(j, m, e, s) for m in members[b][:cap]]
        rows[b] += [(j, m, e, s) for m in members[a][:cap]]
    for r in members:
        want = sorted(rows[r], key=lambda row: (-row[0], row[1]))[:cap]
        lo, hi = starts[r], starts[r + 1]
        got = list(zip(jaccard[lo:hi].tolist(), neighbour[lo:hi].tolist(), estimate[lo:hi].tolist(),
                       bands[lo:hi].tolist()))
        assert got == want, r
        assert {m for m in members[r] if own[m]} == {m for _, m, _, _ in want if rep_of[m] == r}
    assert not any(starts[g + 1] > starts[g] for g in range(n) if g not in members)


def _oracle(verified: pl.DataFrame, rep_of: np.ndarray, keys: pl.Series, top_k: int, bands: int) -> pl.DataFrame:
    """The whole index by polars: every entity against every member of its own group and of
    its representative's partners' groups, sorted by (entity, -jaccard, neighbour), cut at top_k."""
    members = pl.DataFrame({"id": np.arange(len(rep_of)), "rep": rep_of})
    both = pl.concat([verified.rename({"left_rep": "rep", "right_rep": "other"}),
                      verified.rename({"left_rep": "other", "right_rep": "rep"}).select(verified.rename(
                          {"left_rep": "rep", "right_rep": "other"}).columns)])
    same = members.join(members.rename({"id": "nid"}), on="rep").with_columns(
        jaccard=pl.lit(1.0), estimate=pl.lit(1.0), bands_shared=pl.lit(bands, dtype=pl.Int32)).drop("rep")
    paired = members.join(both, on="rep").join(members.rename({"id": "nid", "rep": "other"}), on="other").select(
        "id", "nid", "jaccard", "estimate", "bands_shared")
    rows = pl.concat([same.select(paired.columns), paired]).filter(pl.col("id") != pl.col("nid"))
    rows = rows.sort(["id", "jaccard", "nid"], descending=[False, True, False]).with_columns(
        rank=(pl.col("id").cum_count().over("id")).cast(pl.UInt32)).filter(pl.col("rank") <= top_k)
    return pl.DataFrame([keys.gather(rows["id"]).alias("entity"), keys.gather(rows["nid"]).alias("neighbour"),
                         rows["jaccard"], rows["estimate"], rows["bands_shared"], rows["rank"]])


@pytest.mark.parametrize("top_k", [1, 3, 39, 59, 299])
def test_the_published_rows_are_a_sort_of_every_members_rows(top_k):
    verified, rep_of = _pairs_and_groups(11)
    for keys in (pl.Series("patron", np.arange(len(rep_of), dtype=np.int64) * 7 - 50),
                 pl.Series("patron", [f"p{i:04d}" for i in range(len(rep_of))])):
        want = _oracle(verified, rep_of, keys, top_k, 5)
        expansion = expand(verified, rep_of, top_k, 5)
        assert expansion.published_rows == want.height  # oracle: the polars table's height
        for block in (1 << 62, 97):  # one block, and many of about 97 rows
            got = pl.concat(list(neighbour_blocks(expansion, keys, block)))
            assert got.schema == want.schema and got.equals(want)
