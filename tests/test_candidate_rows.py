"""The join's rows per band: a large join whose pairs rarely repeat writes a row per band a pair
met in (no GROUP BY); verification keeps each pair once with the bands summed; the published
index is the same as with the pairs deduplicated in the join."""

from dataclasses import replace
from itertools import combinations

import numpy as np
import polars as pl
import pytest

from lshjob import EventSpec
from lshjob.index.join import duckdb as duckdb_join
from lshjob.index.join.base import JoinSettings
from lshjob.index.join.duckdb import DuckDBJoin
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")


def _bucket_rows(seed: int, reps: int, bands: int, buckets: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    rows = [(j, int(b), r) for j in range(bands) for r, b in enumerate(rng.integers(0, buckets, size=reps))]
    frame = pl.DataFrame(rows, schema={"band": pl.Int32, "bucket": pl.UInt64, "rep": pl.Int64}, orient="row")
    return frame.filter(pl.len().over("band", "bucket") >= 2)


def _brute_force(rows: pl.DataFrame) -> dict[tuple[int, int], int]:
    """Oracle: every pair of every bucket by itertools, counted per pair (no bucket here is over the cap)."""
    counted: dict[tuple[int, int], int] = {}
    for _, members in rows.group_by("band", "bucket"):
        for a, b in combinations(sorted(members["rep"].to_list()), 2):
            counted[(a, b)] = counted.get((a, b), 0) + 1
    return counted


def _join(tmp_path, rows: pl.DataFrame, bands: int, settings: JoinSettings) -> pl.DataFrame:
    path = tmp_path / "buckets.parquet"
    rows.write_parquet(path)
    out = tmp_path / f"candidates-{settings.dedupe_up_to}-{settings.max_repeat}.parquet"
    made = DuckDBJoin().candidates([path], bands, out, settings)
    table = pl.read_parquet(out)
    assert made.pairs == table.height
    return table


def _summed(table: pl.DataFrame) -> dict[tuple[int, int], int]:
    summed: dict[tuple[int, int], int] = {}
    for a, b, s in table.iter_rows():
        summed[(a, b)] = summed.get((a, b), 0) + s
    return summed


def test_a_large_join_of_rarely_repeating_pairs_writes_a_row_per_band(tmp_path):
    # Oracle: pairs of each bucket by itertools (Python), counted per pair. Many buckets and few
    # bands: pairs rarely meet twice, so past dedupe_up_to the join writes a row per band.
    rows = _bucket_rows(seed=1, reps=400, bands=6, buckets=60)
    expected = _brute_force(rows)
    assert sum(expected.values()) > len(expected)  # some pairs met in two bands or more
    settings = JoinSettings(memory_limit="256MB", threads=1, dedupe_up_to=0, max_repeat=1.5)
    table = _join(tmp_path, rows, 6, settings)
    assert table.height == sum(expected.values()) and (table["bands_shared"] == 1).all()
    assert _summed(table) == expected
    # below dedupe_up_to the join deduplicates: one row per pair, the bands counted
    table = _join(tmp_path, rows, 6, replace(settings, dedupe_up_to=10**9))
    assert table.height == len(expected) and _summed(table) == expected


def test_pairs_that_repeat_often_are_deduplicated_by_the_join(tmp_path):
    # Oracle: as above. Few buckets: pairs meet in most bands (about 1/4 of pairs per band, 8
    # bands: about 2 rows a pair), over max_repeat=1.5, so the join keeps one row per pair.
    rows = _bucket_rows(seed=2, reps=120, bands=8, buckets=4)
    expected = _brute_force(rows)
    assert sum(expected.values()) > 1.5 * len(expected)
    table = _join(tmp_path, rows, 8, JoinSettings(memory_limit="256MB", threads=1, dedupe_up_to=0, max_repeat=1.5))
    assert table.height == len(expected) and _summed(table) == expected


def _long_tailed(seed: int = 3, patrons: int = 1500) -> pl.DataFrame:
    """Small sets of popular titles (Zipf-like), some near-copies: many pairs meet in one band."""
    rng = np.random.default_rng(seed)
    sizes = np.clip(np.round(rng.lognormal(np.log(4.0), 0.9, patrons)), 1, 60).astype(int)
    titles = [np.unique(np.minimum(rng.zipf(1.3, s), 400)) for s in sizes]
    for i in rng.choice(patrons, size=patrons // 5, replace=False):
        src = titles[int(rng.integers(0, patrons))]
        titles[i] = np.unique(np.where(rng.random(len(src)) < 0.2, rng.integers(500, 5000, len(src)), src))
    return pl.DataFrame({"patron": np.repeat(np.arange(patrons), [len(t) for t in titles]),
                         "title": np.concatenate(titles)})


@pytest.mark.parametrize("crowd_size, parts", [(10**6, None), (8, None), (8, 3)],
                         ids=["rows", "rows and crowds", "rows and crowds, three parts"])
def test_rows_per_band_publish_the_same_index_as_deduplicated_pairs(crowd_size, parts, tmp_path, monkeypatch):
    # Oracle: the same run with the join deduplicating (the path checked against brute force
    # in tests/test_run.py); with rows per band (and crowds: buckets of 8 or more members
    # paired up by verification) the neighbours must be the same rows.
    src = tmp_path / "loans.parquet"
    _long_tailed().write_parquet(src)
    options = RunOptions(threshold=0.5, top_k=5, perms=64, bands=16, rows=4)
    deduplicated = run_job(src, SPEC, options, tmp_path / "dedup")
    seen = []
    original = duckdb_join.candidate_pairs

    def per_band(files, out, settings, *args, **kwargs):
        made = original(files, out, replace(settings, dedupe_up_to=0, max_repeat=16.0, crowd_size=crowd_size),
                        *args, **kwargs)
        crowds = pl.read_parquet(made["crowds"]) if made["crowds"] is not None else None
        seen.append((made["rows_per_band"], pl.read_parquet(out, hive_partitioning=False) if out.is_file() else
                     pl.read_parquet(out / "**" / "*.parquet", hive_partitioning=False), crowds))
        return made

    monkeypatch.setattr(duckdb_join, "candidate_pairs", per_band)
    rows = run_job(src, SPEC, replace(options, parts=parts), tmp_path / "rows")
    assert rows["counts"]["parts"] == (parts or 1)
    (chosen, candidates, crowds), = seen
    assert chosen and candidates.height > candidates.select("left_rep", "right_rep").n_unique()  # pairs repeat
    sizes = np.zeros(0) if crowds is None else crowds.group_by("crowd").len()["len"].to_numpy()
    assert (crowds is None) == (crowd_size > 1000) and (sizes >= 8).all()
    assert rows["counts"]["candidate_pairs"] == candidates.height + int((sizes * (sizes - 1) // 2).sum())
    if parts is None:  # in parts, identical sets of different parts keep a representative each
        assert rows["counts"]["candidate_pairs"] > deduplicated["counts"]["candidate_pairs"]
        if crowds is None:
            assert rows["counts"]["verified_pairs"] == deduplicated["counts"]["verified_pairs"]
        else:  # crowd pairs below both sides' top-k floors are not sought (lshjob/index/verify/_crowds.py)
            assert (deduplicated["counts"]["pairs_for_lists"] <= rows["counts"]["verified_pairs"]
                    <= deduplicated["counts"]["verified_pairs"])
    mine = pl.read_parquet(tmp_path / "rows" / "neighbours.parquet")
    assert mine.height > 0 and mine.equals(pl.read_parquet(tmp_path / "dedup" / "neighbours.parquet"))


def test_a_run_in_parts_keeps_only_pairs_a_list_can_take_and_publishes_the_one_part_index(tmp_path, monkeypatch):
    # Each block of parts is cut by the top-k with only its own pairs; the blocks are then cut
    # again together, so what verification hands to publishing holds no pair that can enter
    # neither side's list (lshjob.index._ranking.pairs_in_lists, itself checked against a
    # Python sort of every list in tests/test_top_k_cut.py), and the index is the one-part run's.
    from lshjob.index._ranking import pairs_in_lists
    from lshjob.index.verify import local

    src = tmp_path / "loans.parquet"
    _long_tailed().write_parquet(src)
    options = RunOptions(threshold=0.5, top_k=3, perms=64, bands=16, rows=4)
    seen = []
    original = local.LocalVerify.verify

    def kept(self, candidates, store, threshold, params, settings, crowds=None):
        got = original(self, candidates, store, threshold, params, settings, crowds)
        seen.append((got, settings.group_sizes))
        return got

    monkeypatch.setattr(local.LocalVerify, "verify", kept)
    one = run_job(src, SPEC, options, tmp_path / "one")
    three = run_job(src, SPEC, replace(options, parts=3), tmp_path / "three")
    assert three["counts"]["parts"] == 3
    got, sizes = seen[1]
    assert three["counts"]["verified_pairs"] > 2 * got.height  # the cuts dropped pairs
    keep = pairs_in_lists(got["left_rep"].to_numpy(), got["right_rep"].to_numpy(), got["jaccard"].to_numpy(), sizes, 3)
    assert keep.all()
    assert pl.read_parquet(tmp_path / "one/neighbours.parquet").equals(
        pl.read_parquet(tmp_path / "three/neighbours.parquet"))
    assert one["counts"]["published_rows"] == three["counts"]["published_rows"]
