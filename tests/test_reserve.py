"""Buckets over the cap held in reserve by the join (sql/reserve.sql) and judged by verification
(lshjob/index/verify/_reserve.py), each against an oracle written apart: Python dicts and
itertools over the bucket rows, Python sets for Jaccard, MurmurHash3's fmix64 in Python
integers (lshjob.index.conformance.fmix64_int) for the members drawn."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.index.conformance import fmix64_int, join_input
from lshjob.index.join.base import JoinSettings
from lshjob.index.join.duckdb import DuckDBJoin
from lshjob.index.verify._jaccard import element_masks
from lshjob.index.verify._reserve import SAMPLED, bucket_gains, drawn_members, worth_comparing


def reference_reserve(rows: pl.DataFrame, bands: int, cap: int, reserve_cap: int) -> dict:
    """{(band, sorted members): skipped pairs} of every bucket of cap < size <= reserve_cap:
    its pairs less those of its sub-buckets (by the next band's bucket) of at most cap."""
    members: dict = {}
    bucket_of: dict = {}
    for band, bucket, rep in rows.iter_rows():
        members.setdefault((band, bucket), []).append(rep)
        bucket_of[(rep, band)] = bucket
    out = {}
    for (band, _), reps in members.items():
        if not cap < len(reps) <= reserve_cap:
            continue
        subs: dict = {}
        for rep in reps:
            subs.setdefault(bucket_of[(rep, (band + 1) % bands)], []).append(rep)
        kept = sum(len(g) * (len(g) - 1) // 2 for g in subs.values() if len(g) <= cap)
        out[(band, tuple(sorted(reps)))] = len(reps) * (len(reps) - 1) // 2 - kept
    return out


@pytest.mark.parametrize("per_band", [False, True], ids=["pairs", "rows-per-band"])
@pytest.mark.parametrize("cap, reserve_cap", [(8, 1000), (8, 12), (3, 1000)])
def test_the_join_holds_the_buckets_over_its_cap_in_reserve(tmp_path, per_band, cap, reserve_cap):
    every = join_input()  # seeded bucket rows with oversize buckets (the join conformance check's)
    shared = every.filter(pl.len().over("band", "bucket") >= 2)
    shared.write_parquet(tmp_path / "buckets.parquet")
    files = [tmp_path / "buckets.parquet"]
    settings = JoinSettings(memory_limit="512MB", temp_directory=str(tmp_path / "spill"), threads=2, max_bucket=cap,
                            reserve_cap=reserve_cap)
    if per_band:  # a large join, crowds from 4 members: the reserve starts over the same cap
        settings = replace(settings, dedupe_up_to=0, max_repeat=64.0, crowd_size=min(4, cap), max_crowd=cap)
    joined = DuckDBJoin().candidates(files, 4, tmp_path / "candidates.parquet", settings, every.height)
    expected = reference_reserve(every, 4, cap, reserve_cap)
    assert expected, "the input has buckets over the cap"
    reserve = pl.read_parquet(joined.reserve)
    assert reserve.columns == ["crowd", "rep", "band", "skipped"]
    assert reserve.select(pl.struct("crowd", "rep").is_unique().all()).item()
    assert reserve["crowd"].to_list() == sorted(reserve["crowd"].to_list())
    got = {(band, tuple(sorted(reps))): skipped for band, reps, skipped in reserve.group_by("crowd").agg(
        pl.col("band").first(), "rep", pl.col("skipped").first()).drop("crowd").iter_rows()}
    assert got == expected
    # what the reserve holds is what the skew report counts as skipped, when every such bucket fits
    if reserve_cap >= joined.skew["largest_bucket"]:
        assert sum(expected.values()) == joined.skew["skipped_pairs"]


def test_no_reserve_unless_asked(tmp_path):
    every = join_input()
    every.filter(pl.len().over("band", "bucket") >= 2).write_parquet(tmp_path / "buckets.parquet")
    files = [tmp_path / "buckets.parquet"]
    settings = JoinSettings(memory_limit="512MB", temp_directory=str(tmp_path / "spill"), threads=2, max_bucket=8)
    joined = DuckDBJoin().candidates(files, 4, tmp_path / "candidates.parquet", settings, every.height)
    assert joined.skew["skipped_pairs"] > 0 and joined.reserve is None
    assert not list(tmp_path.glob("*reserve*"))


def test_members_drawn_are_those_whose_id_hashes_lowest():
    rng = np.random.default_rng(5)
    reps = rng.choice(10**9, size=500, replace=False)
    reserve = pl.DataFrame({"crowd": np.repeat([1, 2, 3], [300, 150, 50]), "rep": reps}).sort("crowd", "rep")
    drawn = drawn_members(reserve.sample(fraction=1.0, shuffle=True, seed=1))  # whatever the row order
    for crowd in (1, 2, 3):
        ids = reserve.filter(pl.col("crowd") == crowd)["rep"].to_list()
        expected = sorted(sorted(ids, key=fmix64_int)[:SAMPLED])
        assert drawn.filter(pl.col("crowd") == crowd)["rep"].to_list() == expected


def reference_gain(sets: list[set], bucket: list[int], a: int, threshold: float, floor: float, weights, held: set,
                   group_sizes, top_k: int) -> float:
    """A drawn member's gain (lshjob/index/verify/_reserve.py docstring), from Python sets."""
    new = sum(weights[b] for b in bucket if b != a and (min(a, b), max(a, b)) not in held
              and (j := len(sets[a] & sets[b]) / len(sets[a] | sets[b])) >= threshold and j > floor)
    if new == 0:
        return 0.0
    had = group_sizes[a] - 1 + sum(weights[b if x == a else x] for x, b in held if a in (x, b))
    return min(new, top_k) / min(new + had, top_k)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_bucket_gains_against_python_sets(seed):
    rng = np.random.default_rng(seed)
    n, top_k, threshold = 160, 4, 0.4
    # small sets over few elements, so that many pairs reach the threshold
    sets = [set(rng.choice(12, size=rng.integers(1, 6), replace=False).tolist()) for _ in range(n)]
    frame = pl.DataFrame({"entity": np.repeat(np.arange(n), [len(s) for s in sets]),
                          "element": [e for s in sets for e in sorted(s)]})
    element_sets = ElementSets.from_sets(frame)
    buckets = [sorted(rng.choice(n, size=size, replace=False).tolist()) for size in (30, 50, 100)]
    reserve = pl.DataFrame({"crowd": np.repeat([1, 2, 3], [len(b) for b in buckets]),
                            "rep": [r for b in buckets for r in b]})
    floors = np.where(rng.random(n) < 0.5, -1.0, rng.choice([0.4, 0.5, 0.6, 1.0], size=n))
    group_sizes = rng.integers(1, 4, n)
    weights = np.minimum(top_k + 1, group_sizes)
    held_pairs = {tuple(sorted(rng.choice(n, 2, replace=False).tolist())) for _ in range(300)}
    held = pl.DataFrame({"left_rep": [a for a, _ in held_pairs], "right_rep": [b for _, b in held_pairs]})
    got = bucket_gains(reserve, element_sets, element_masks(element_sets.offsets, element_sets.elements), threshold,
                       floors, weights, top_k, held, group_sizes)
    drawn = drawn_members(reserve)
    for crowd, bucket in enumerate(buckets, start=1):
        picked = drawn.filter(pl.col("crowd") == crowd)["rep"].to_list()
        assert len(picked) == min(SAMPLED, len(bucket))
        expected = np.mean([reference_gain(sets, bucket, a, threshold, floors[a], weights, held_pairs, group_sizes,
                                           top_k) for a in picked])
        assert got.filter(pl.col("crowd") == crowd)["gain"].item() == pytest.approx(expected, abs=1e-12)
    assert got["gain"].max() > 0  # the check sees gains, not only zeros


def test_bucket_work_counts_the_partners_comparing_it_whole_would_try():
    # Oracle: Python sets, the crowd kernel's rule (lshjob/index/verify/_crowds.py
    # _crowd_pairs_within): in a member's size range at the threshold, a partner is tried when
    # the elements every member holds (C) may bring the pair to the threshold alone (needed
    # intersection ceil(t / (1 + t) * (|A| + |B|)) <= |C|), or when it shares another element.
    rng = np.random.default_rng(5)
    n, threshold = 300, 0.5
    # bucket 1: every member holds element 0, a popular title; bucket 2: no element in common
    sets = [{0, *rng.choice(np.arange(1, 20), size=rng.integers(0, 5), replace=False).tolist()} for _ in range(150)]
    sets += [set(rng.choice(np.arange(1, 20), size=rng.integers(1, 6), replace=False).tolist()) for _ in range(150)]
    frame = pl.DataFrame({"entity": np.repeat(np.arange(n), [len(s) for s in sets]),
                          "element": [e for s in sets for e in sorted(s)]})
    element_sets = ElementSets.from_sets(frame)
    masks = element_masks(element_sets.offsets, element_sets.elements)
    codes = element_sets.elements
    # the check is exact only where no two elements share a mask bit (element_masks)
    assert len({int(m) for m in element_masks(np.arange(21), np.arange(20))}) == 20
    buckets = [list(range(0, 150)), list(range(150, 300))]
    reserve = pl.DataFrame({"crowd": np.repeat([1, 2], 150), "rep": [r for b in buckets for r in b]})
    got = bucket_gains(reserve, element_sets, masks, threshold, np.full(n, -1.0), np.ones(n, dtype=np.int64), 0,
                       None)
    as_codes = [set(codes[element_sets.offsets[i]:element_sets.offsets[i + 1]].tolist()) for i in range(n)]
    drawn = drawn_members(reserve)
    for crowd, bucket in enumerate(buckets, start=1):
        common = set.intersection(*(as_codes[b] for b in bucket))
        tried = []
        for a in drawn.filter(pl.col("crowd") == crowd)["rep"].to_list():
            la = len(as_codes[a])
            tried.append(sum(
                1 for b in bucket if b != a and threshold * la <= len(as_codes[b]) <= la / threshold and (
                    math.ceil(threshold / (1 + threshold) * (la + len(as_codes[b])) - 1e-9) <= len(common)
                    or (as_codes[a] - common) & as_codes[b])))
        expected = len(bucket) * np.mean(tried) / 2
        assert got.filter(pl.col("crowd") == crowd)["work"].item() == pytest.approx(expected)
    assert len(set.intersection(*(as_codes[b] for b in buckets[0]))) == 1  # the first bucket has its C
    assert got["work"].min() > 0


def test_buckets_worth_comparing_come_in_two_tiers_within_their_budgets():
    # By hand. Tier one, gains of RESCUE_GAIN (0.25) or more, by gain: 0.9 (crowd 4), 0.8 (2),
    # 0.5 (1), 0.3 (5); with a budget of 100: 4 (60) fits, 2 (50) would pass 100 and is left, 1
    # (30) fits, 5 (20) would pass it. Tier two, gains of RESCUE_SOME (0.02) up to 0.25, by
    # members x gain / work: crowd 3 (10 x 0.1 / 1 = 1.0), 6 (100 x 0.2 / 400 = 0.05), 7
    # (10 x 0.05 / 50 = 0.01); crowd 8 gains too little (0.01), however cheap.
    gains = pl.DataFrame({"crowd": [1, 2, 3, 4, 5, 6, 7, 8], "members": [10, 10, 10, 10, 10, 100, 10, 10],
                          "gain": [0.5, 0.8, 0.1, 0.9, 0.3, 0.2, 0.05, 0.01],
                          "work": [30.0, 50.0, 1.0, 60.0, 20.0, 400.0, 50.0, 0.5]})
    assert worth_comparing(gains, 100.0).to_list() == [4, 1]
    assert worth_comparing(gains, 1e9).to_list() == [4, 2, 1, 5]
    assert worth_comparing(gains, 10.0).to_list() == []
    assert worth_comparing(gains, 100.0, 60.0).to_list() == [4, 1, 3, 7]  # 6 (400) would pass 60
    assert worth_comparing(gains, 10.0, 1e9).to_list() == [3, 6, 7]
