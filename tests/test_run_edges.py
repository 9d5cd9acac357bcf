"""lshjob run where there is little or nothing to pair: no candidate, identical sets only,
every bucket oversize, threshold 1.0, one entity, candidates that all fail verification; in
one part and in three, both schemes, text and integer keys.

Oracle: exact Jaccard of every pair of distinct sets by Python set arithmetic (brute force),
identical sets paired with Jaccard 1; each entity's expected list is its true neighbours
sorted by (Jaccard descending, neighbour key ascending) and cut at top-k, as the index
contract (lshjob/index/publish.py) states.
"""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import replace

import polars as pl
import pytest

from lshjob import EventSpec
from lshjob.index.join import duckdb as duckdb_join
from lshjob.jobs import crowd_caps
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")


def _disjoint(n=300):
    return [(f"p{i}", f"t{i}") for i in range(n)]


def _all_same(n=20_000):
    return [(f"p{i}", "t0") for i in range(n)]


def _all_same_and_a_pair():
    return _all_same() + [("q1", "a"), ("q1", "b"), ("q2", "a"), ("q2", "b"), ("q3", "a"), ("q3", "c")]


def _crowd():
    # 30 patrons sharing 9 titles, one title of their own each: every pair J = 9/11, every bucket
    # of every band holds (nearly) all of them, far over --max-bucket 2, and so does every split.
    return [(f"p{i}", f"c{j}") for i in range(30) for j in range(9)] + [(f"p{i}", f"u{i}") for i in range(30)]


def _failing():
    # 50 patrons sharing 5 titles and holding 5 of their own: every pair J = 5/15, candidates
    # through 32 bands of one row, none reaching 0.9.
    return [(f"p{i}", f"c{j}") for i in range(50) for j in range(5)] + [
        (f"p{i}", f"u{i}-{j}") for i in range(50) for j in range(5)]


CASES = {
    # name: (rows, options, whether every true pair must be found: LSH cannot miss here; "one-part": in one part)
    "disjoint": (_disjoint, {}, True),
    "all-identical": (_all_same, {"top_k": 3}, True),
    "all-identical-and-a-pair": (_all_same_and_a_pair, {"top_k": 3}, True),
    # in one part the join holds the buckets in reserve, and verification compares them: every
    # patron's list has room (lshjob.index.verify._reserve); in parts they are skipped
    "every-bucket-oversize": (_crowd, {"max_bucket": 2, "perms": 32, "bands": 8, "rows": 4}, "one-part"),
    "threshold-1-no-identical": (_disjoint, {"threshold": 1.0}, True),
    "one-entity": (lambda: [("p0", "t0"), ("p0", "t1")], {}, True),
    "all-fail-verification": (_failing, {"threshold": 0.9, "perms": 32, "bands": 32, "rows": 1}, True),
}


def events_of(rows, integer: bool) -> pl.DataFrame:
    frame = pl.DataFrame(rows, schema=["patron", "title"], orient="row")
    if integer:  # the same sets under integer keys (p17 -> 17, q2 -> 900002; titles numbered)
        number = pl.col("patron").str.slice(1).cast(pl.Int64)
        frame = frame.with_columns(
            pl.when(pl.col("patron").str.starts_with("q")).then(number + 900_000).otherwise(number).alias("patron"),
            pl.col("title").rank("dense").cast(pl.Int64))
    return frame


def expected_index(events: pl.DataFrame, threshold: float, top_k: int) -> dict:
    """{(entity, neighbour): (jaccard, rank)} by brute force over all pairs of distinct sets.
    An entity's list is cut at top_k after sorting by (Jaccard desc, key), so of a group of
    identical sets only the top_k + 1 smallest keys can be anyone's neighbour: the others are
    not listed (20,000 identical sets would make 4e8 list entries)."""
    sets: dict = {}
    for entity, element in events.iter_rows():
        sets.setdefault(entity, set()).add(element)
    groups: dict = {}
    for entity, items in sets.items():
        groups.setdefault(frozenset(items), []).append(entity)
    heads = {s: sorted(members)[:top_k + 1] for s, members in groups.items()}
    out = {}
    for sa, ma in groups.items():
        others = [(1.0, b) for b in heads[sa]]  # identical sets: Jaccard 1 (self removed below)
        for sb, head in heads.items():  # every pair of distinct sets
            if sb != sa:
                jac = len(sa & sb) / len(sa | sb)
                others += [(jac, b) for b in head] if jac >= threshold else []
        others.sort(key=lambda x: (-x[0], x[1]))
        for a in ma:
            ranked = [x for x in others if x[1] != a][:top_k]
            for rank, (jac, b) in enumerate(ranked, start=1):
                out[(a, b)] = (jac, rank)
    return out


@pytest.mark.parametrize("integer", [False, True], ids=["text", "int"])
@pytest.mark.parametrize("scheme", ["kperm", "oph"])
@pytest.mark.parametrize("parts", [None, 3], ids=["one-part", "three-parts"])
@pytest.mark.parametrize("case", list(CASES))
def test_little_to_pair_still_publishes_a_valid_index(tmp_path, case, parts, scheme, integer):
    make, extra, complete = CASES[case]
    events = events_of(make(), integer)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    options = RunOptions(**{"threshold": 0.5, "parts": parts, "scheme": scheme, **extra})
    out = tmp_path / "idx"
    m = run_job(src, SPEC, options, out)

    table = pl.read_parquet(out / "neighbours.parquet")
    key = pl.Int64 if integer else pl.String
    assert table.schema == pl.Schema({"entity": key, "neighbour": key, "jaccard": pl.Float64,
                                      "estimate": pl.Float64, "bands_shared": pl.Int32, "rank": pl.UInt32})
    assert json.loads((out / "manifest.json").read_text()) == m
    assert m["output"]["rows"] == m["counts"]["published_rows"] == table.height
    got = {(e, n): (j, r) for e, n, j, r in table.select("entity", "neighbour", "jaccard", "rank").iter_rows()}
    truth = expected_index(events, options.threshold, options.top_k)
    if complete is True:
        assert got == truth
    elif complete == "one-part" and parts is None:  # found through the reserve, nothing left to warn of
        assert m["counts"]["oversize_buckets_compared"] > 0 and m["skew"]["skipped_pairs"] > 0
        assert not any("not compared" in w for w in m["warnings"])
        assert all(abs(truth[pair][0] - jac) < 1e-12 for pair, (jac, _) in got.items())
        # each pair at J = 9/11 meets in some band with chance 1 - (1 - (9/11)^4)^8 = 0.992 (the
        # S-curve); skipped, none would be found
        assert len(got) >= 0.95 * len(truth)
    else:  # pairs of skipped buckets are lost, and reported; what is published is exact
        assert all(abs(truth[pair][0] - jac) < 1e-12 for pair, (jac, _) in got.items())
        assert m["skew"]["skipped_pairs"] > 0 and any("not compared" in w for w in m["warnings"])
    if table.height == 0:
        assert any("empty" in w for w in m["warnings"])


def test_cli_run_with_no_pair_exits_0_and_prints_the_manifest(tmp_path):
    # Oracle: 300 disjoint sets have no pair at any threshold (set arithmetic).
    src = tmp_path / "loans.parquet"
    events_of(_disjoint(), False).write_parquet(src)
    out = tmp_path / "idx"
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", str(src), "--entity", "patron",
                           "--element", "title", "--threshold", "0.5", "--out", str(out), "--json", "--quiet"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    printed = json.loads(done.stdout)
    assert printed == json.loads((out / "manifest.json").read_text())
    assert printed["command"][1:] == ["run", str(src), "--entity", "patron", "--element", "title",
                                      "--threshold", "0.5", "--out", str(out), "--json", "--quiet"]
    table = pl.read_parquet(out / "neighbours.parquet")
    assert table.height == 0 and table.columns == ["entity", "neighbour", "jaccard", "estimate", "bands_shared", "rank"]
    assert sorted(p.name for p in out.iterdir()) == ["manifest.json", "neighbours.parquet"]


def test_a_run_that_fails_early_leaves_no_folder(tmp_path):
    # A bad column is refused before anything is written; the folder the run would have made is not left.
    src = tmp_path / "loans.parquet"
    events_of(_disjoint(10), False).write_parquet(src)
    with pytest.raises(Exception, match="reader"):
        run_job(src, EventSpec(entity="reader", element="title"), RunOptions(threshold=0.5), tmp_path / "idx")
    assert not (tmp_path / "idx").exists()


def _bestseller_loans(tmp_path, monkeypatch, large_join: bool):
    """1,200 patrons holding a bestseller and one title of their own, one holding the
    bestseller alone (tests below), written as a loans file; with ``large_join``, the join is
    made to write a row per band (as tests/test_candidate_rows.py forces it), so that buckets
    of 64 members or more go to verification as crowds, up to --max-crowd; a small join writes
    the pairs of buckets up to --max-bucket."""
    rows = [("p0", "best")] + [(f"p{i}", "best") for i in range(1, 1201)] + [(f"p{i}", f"own{i}")
                                                                             for i in range(1, 1201)]
    events = events_of(rows, False)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    if large_join:
        original = duckdb_join.candidate_pairs
        monkeypatch.setattr(duckdb_join, "candidate_pairs", lambda files, out, settings, *a, **k: original(
            files, out, replace(settings, dedupe_up_to=0, max_repeat=64.0), *a, **k))
    return src, events


@pytest.mark.parametrize("large_join", [False, True], ids=["pairs-deduplicated", "rows-per-band"])
def test_a_bestseller_skipped_as_oversize_is_named_with_the_cap_that_compares_it(tmp_path, monkeypatch, large_join):
    # 1,200 patrons holding a bestseller and one title of their own, one holding the bestseller
    # alone: each pair (alone, pair) is at Jaccard 0.5 (1 shared of 2), the pairs of two
    # holders at 1/3. With rows=1 the bestseller is the minimum of a holder in half the bands,
    # so its bucket holds about 600 sets a band, over a cap of 100 even once split by the next
    # band: every (alone, pair) pair is left out. The warning names the cap that verifies
    # them, and with it the index is the brute-force index (oracle: expected_index above,
    # Python set arithmetic; r=1 over 32 bands misses such a pair with chance 2^-32).
    # The warning names the cap that binds: --max-crowd for a large join, --max-bucket for a small one.
    monkeypatch.setattr(crowd_caps, "RESERVE_MEMBERS", 0)  # no bucket held in reserve (test below)
    src, events = _bestseller_loans(tmp_path, monkeypatch, large_join)
    plan = {"threshold": 0.5, "top_k": 5, "perms": 32, "bands": 32, "rows": 1, "max_bucket": 100}
    truth = expected_index(events, 0.5, 5)

    capped = run_job(src, SPEC, RunOptions(**plan, max_crowd=100), tmp_path / "capped")
    largest = capped["skew"]["largest_bucket"]
    assert capped["skew"]["skipped_pairs"] > 0 and largest > 100
    flag = "--max-crowd" if large_join else "--max-bucket"
    assert any(f"run with {flag} {largest}" in w for w in capped["warnings"]), capped["warnings"]
    published = pl.read_parquet(tmp_path / "capped" / "neighbours.parquet")
    lost = 1200 - published.filter(pl.col("neighbour") == "p0").height  # each holder's one true neighbour
    assert lost > 600  # most were in the skipped sub-buckets

    cap = {"max_crowd": largest} if flag == "--max-crowd" else {"max_bucket": largest, "max_crowd": largest}
    widened = run_job(src, SPEC, RunOptions(**{**plan, **cap}), tmp_path / "widened")
    assert widened["skew"]["skipped_pairs"] == 0
    assert not any("not compared" in w for w in widened["warnings"])
    table = pl.read_parquet(tmp_path / "widened" / "neighbours.parquet")
    got = {(e, n): (j, r) for e, n, j, r in table.select("entity", "neighbour", "jaccard", "rank").iter_rows()}
    assert got == truth


@pytest.mark.parametrize("large_join", [False, True], ids=["pairs-deduplicated", "rows-per-band"])
def test_a_bestseller_over_the_cap_is_compared_from_the_reserve_in_one_part(tmp_path, monkeypatch, large_join):
    # The patrons above, at the default caps' shape (a cap of 100 under buckets of about 600):
    # in one part the join holds the oversize buckets in reserve, and a sample of their members
    # shows lists with nothing else in them, so verification compares them whole. The index is
    # the brute-force index (oracle: expected_index, Python set arithmetic), with no warning;
    # in parts there is no reserve, and the pairs are lost and warned of.
    src, events = _bestseller_loans(tmp_path, monkeypatch, large_join)
    plan = {"threshold": 0.5, "top_k": 5, "perms": 32, "bands": 32, "rows": 1, "max_bucket": 100, "max_crowd": 100}
    truth = expected_index(events, 0.5, 5)

    one = run_job(src, SPEC, RunOptions(**plan), tmp_path / "one")
    assert one["skew"]["skipped_pairs"] > 0 and one["counts"]["oversize_buckets_compared"] > 0
    assert not any("not compared" in w for w in one["warnings"]), one["warnings"]
    table = pl.read_parquet(tmp_path / "one" / "neighbours.parquet")
    got = {(e, n): (j, r) for e, n, j, r in table.select("entity", "neighbour", "jaccard", "rank").iter_rows()}
    assert got == truth
    assert table["bands_shared"].min() >= 1

    parts = run_job(src, SPEC, RunOptions(**plan, parts=2), tmp_path / "parts")
    assert "oversize_buckets_compared" not in parts["counts"]
    assert any("not compared" in w and "a run of one part" in w for w in parts["warnings"]), parts["warnings"]
    published = pl.read_parquet(tmp_path / "parts" / "neighbours.parquet")
    assert 1200 - published.filter(pl.col("neighbour") == "p0").height > 600
