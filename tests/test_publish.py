"""Publishing under the memory budget: the index's size counted before it is made, a top-k
larger than the entities clamped, an index too large for the budget refused before the work,
and the rows made a block at a time (peak resident memory of a real process)."""

from __future__ import annotations

import json
import subprocess
import sys
from math import comb

import numpy as np
import polars as pl
import pytest
from helpers import neighbour_table
from test_run_edges import expected_index

from lshjob import EventSpec, ParameterError
from lshjob.index.publish import expand, neighbour_blocks
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")


def groups_of_identical_sets(groups: int, size: int) -> pl.DataFrame:
    """``groups`` x ``size`` patrons (integer keys); patron i borrows only title i mod groups."""
    n = groups * size
    return pl.DataFrame({"patron": np.arange(n, dtype=np.int64), "title": np.arange(n, dtype=np.int64) % groups})


def test_the_count_made_before_expanding_is_the_number_of_rows_published():
    # Oracle: the table itself, made at once; and algebra: a group of m identical sets alone
    # publishes m x min(k, m - 1) rows.
    rng = np.random.default_rng(5)
    n = 400
    rep_of = np.arange(n)
    rep_of[100:160] = 100  # a group of 60
    rep_of[200:203] = 200  # a group of 3
    reps = np.unique(rep_of)
    pairs = {tuple(sorted(rng.choice(reps, 2, replace=False))) for _ in range(300)}
    left, right = np.array(sorted(pairs)).T
    verified = pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": rng.uniform(0.5, 1, len(left)),
                             "estimate": rng.uniform(0.5, 1, len(left)), "bands_shared": np.ones(len(left), np.int32)})
    keys = pl.Series("entity", np.arange(n) * 7)
    for k in (1, 4, 59, 60, 399):
        whole = neighbour_table(verified, rep_of, keys, k, 3)
        assert expand(verified, rep_of, k, 3).published_rows == whole.height
        # Rows made a few entities at a time: the same table.
        chunked = pl.concat(list(neighbour_blocks(expand(verified, rep_of, k, 3), keys, 70)))
        assert chunked.equals(whole)
    alone = verified.clear()
    assert expand(alone, rep_of, 10, 3).published_rows == 60 * 10 + 3 * 2


def test_a_top_k_over_the_entities_is_clamped_and_recorded(tmp_path):
    # Oracle: brute force over Python sets (tests/test_run_edges.py) with top-k = n - 1.
    events = pl.concat([groups_of_identical_sets(3, 20),
                        pl.DataFrame({"patron": [1000, 1000, 1001, 1001], "title": [0, 7, 0, 8]})])
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    n = 62
    m = run_job(src, SPEC, RunOptions(threshold=0.3, top_k=10**6), tmp_path / "idx")
    assert m["top_k_effective"] == n - 1 and m["options"]["top_k"] == 10**6
    assert any("--top-k 1000000 is more than the 61 other entities" in w for w in m["warnings"])
    table = pl.read_parquet(tmp_path / "idx/neighbours.parquet")
    got = {(e, o): (j, r) for e, o, j, r in table.select("entity", "neighbour", "jaccard", "rank").iter_rows()}
    assert got == expected_index(events, 0.3, n - 1)
    meta = json.loads(pl.read_parquet_metadata(tmp_path / "idx/neighbours.parquet")["lshjob"])
    assert meta["top_k"] == 10**6 and meta["top_k_effective"] == n - 1


def test_an_index_larger_than_the_budget_is_refused_before_the_work(tmp_path):
    # 50,000 identical sets with top-k 1,000,000 (clamped to 49,999): 50,000 x 49,999 rows
    # (algebra), 40 bytes each with integer keys, far over 1 GB.
    src = tmp_path / "loans.parquet"
    groups_of_identical_sets(1, 50_000).write_parquet(src)
    with pytest.raises(ParameterError, match=r"--top-k 1000000 over a group of 50000 identical sets would publish "
                                             r"2\.5e\+09 rows \(~93\.1 GiB\); the budget is 0\.9 GiB") as info:
        run_job(src, SPEC, RunOptions(threshold=0.5, top_k=10**6, memory="1GB"), tmp_path / "idx")
    assert 50_000 * 49_999 == comb(50_000, 2) * 2
    assert not (tmp_path / "idx").exists()
    assert "lower --top-k or raise --memory" in str(info.value)
    # In three parts each part's group is collapsed apart: 3 x 16,667 x 16,666 rows at least.
    with pytest.raises(ParameterError, match=r"over a group of 1666[67] identical sets would publish 8\.33e\+08 rows"):
        run_job(src, SPEC, RunOptions(threshold=0.5, top_k=10**6, memory="1GB", parts=3), tmp_path / "idx")
    assert not (tmp_path / "idx").exists()


MEASURE = ("import json, resource, subprocess, sys; "
           "done = subprocess.run(sys.argv[1:], capture_output=True, text=True); "
           "print(json.dumps({'code': done.returncode, 'peak': resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss "
           "* 1024, 'stdout': done.stdout, 'stderr': done.stderr[-2000:]}))")


def test_publishing_ten_million_rows_keeps_to_a_512mib_budget(tmp_path, compiled_kernels):
    # 40 groups of 500 identical sets, top-k 1000: 20,000 x 499 = 9.98 million rows (algebra),
    # about 0.37 GiB as a table; made at once, publishing peaked at 1.40 GiB (measured).
    # Measured: the peak resident memory of the run's own process (getrusage of a child
    # process that runs only it, so no other child of the test process counts).
    src = tmp_path / "loans.parquet"
    groups_of_identical_sets(40, 500).write_parquet(src)
    out = tmp_path / "idx"
    cmd = [sys.executable, "-m", "lshjob.cli.app", "run", str(src), "--entity", "patron", "--element", "title",
           "--threshold", "0.5", "--top-k", "1000", "--memory", "512MiB", "--out", str(out), "--json", "--quiet"]
    # The kernels are compiled (and cached) by a first run: compiling takes memory of its own
    # (LLVM), once per machine, which is not what this test measures.
    subprocess.run(cmd[:-3] + [str(tmp_path / "warm"), "--json", "--quiet"], capture_output=True, timeout=300)
    measured = json.loads(subprocess.run([sys.executable, "-c", MEASURE, *cmd], capture_output=True, text=True,
                                         timeout=300).stdout)
    assert measured["code"] == 0, measured["stderr"]
    manifest = json.loads(measured["stdout"])
    assert manifest["counts"]["published_rows"] == 20_000 * 499
    assert measured["peak"] <= 512 * 2**20, measured["peak"] / 2**20
    table = pl.scan_parquet(out / "neighbours.parquet")
    summary = table.group_by("entity").agg(
        pl.len(), pl.col("rank").max(), (pl.col("neighbour") % 40 == pl.col("entity") % 40).all()).collect()
    assert summary.height == 20_000 and (summary["len"] == 499).all() and (summary["rank"] == 499).all()
    assert summary["neighbour"].all()  # every neighbour has the same set (same title)
