"""lshjob diff: pairs added, removed and with a changed Jaccard, the churn rate and the
entities whose top-k list changed, checked against brute force over Python sets of pairs."""

import json

import polars as pl
import pytest
from helpers import planted_pairs
from typer.testing import CliRunner

from lshjob import EventSpec
from lshjob.cli.app import app
from lshjob.jobs.diff import diff_indexes
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")


@pytest.fixture(scope="module")
def two_indexes(tmp_path_factory):
    """Two versions of the library's index: the second month drops some patrons' loans,
    adds new patrons and changes a few sets (so some pairs go, some come, some change)."""
    root = tmp_path_factory.mktemp("diff")
    before = planted_pairs(30, 0.5, seed=5, background=200)
    after = before.filter(~pl.col("patron").str.starts_with("P0000"))  # pairs 0-9 leave
    extra = planted_pairs(40, 0.5, seed=6, background=0).filter(pl.col("patron").str.contains("P0003"))
    after = pl.concat([after, extra.with_columns(pl.col("patron") + "n")])
    # the pair sharing most titles gains one title on its a side: its Jaccard changes, the pair stays
    shared = after.filter(pl.col("patron").str.ends_with("a")).group_by("patron").len().sort("len").row(-1)[0]
    after = pl.concat([after, pl.DataFrame({"patron": [shared], "title": ["extra-title"]})])
    paths = {}
    for name, events in (("old", before), ("new", after)):
        src = root / f"{name}.parquet"
        events.write_parquet(src)
        run_job(src, SPEC, RunOptions(threshold=0.4, top_k=3, perms=64, bands=16, rows=4), root / name)
        paths[name] = root / name
    return paths


def _pairs(folder) -> dict[frozenset, float]:
    rows = pl.read_parquet(folder / "neighbours.parquet")
    return {frozenset((e, n)): j for e, n, j in rows.select("entity", "neighbour", "jaccard").iter_rows()}


def _lists(folder) -> dict[str, set]:
    lists: dict[str, set] = {}
    for e, n in pl.read_parquet(folder / "neighbours.parquet").select("entity", "neighbour").iter_rows():
        lists.setdefault(e, set()).add(n)
    return lists


def test_diff_matches_brute_force_over_sets_of_pairs(two_indexes, tmp_path):
    # Oracle: Python sets of unordered pairs (frozensets) and of each entity's neighbours.
    old, new = _pairs(two_indexes["old"]), _pairs(two_indexes["new"])
    summary = diff_indexes(two_indexes["old"], two_indexes["new"], tmp_path / "changed.parquet")
    added, removed, kept = new.keys() - old.keys(), old.keys() - new.keys(), old.keys() & new.keys()
    assert added and removed  # the data moves both ways
    assert summary["pairs_added"] == len(added)
    assert summary["pairs_removed"] == len(removed)
    assert summary["pairs_kept"] == len(kept)
    assert summary["pairs_jaccard_changed"] == sum(old[p] != new[p] for p in kept) >= 1
    assert summary["churn_rate"] == pytest.approx((len(added) + len(removed)) / len(old.keys() | new.keys()))

    lo, ln = _lists(two_indexes["old"]), _lists(two_indexes["new"])
    expected = {}
    for e in lo.keys() | ln.keys():
        a, b = lo.get(e, set()), ln.get(e, set())
        if a != b:
            expected[e] = (len(b - a), len(a - b), len(a & b), 1 - len(a & b) / len(a | b))
    table = pl.read_parquet(tmp_path / "changed.parquet")
    got = {r["entity"]: (r["entered"], r["left"], r["kept"], r["list_change"]) for r in table.iter_rows(named=True)}
    assert got.keys() == expected.keys()
    for e, (entered, left, k, change) in expected.items():
        assert got[e][:3] == (entered, left, k)
        assert got[e][3] == pytest.approx(change)
    assert table["list_change"].to_list() == sorted(table["list_change"].to_list(), reverse=True)
    assert summary["entities_changed"] == len(expected)


def test_same_index_has_no_change(two_indexes):
    # Oracle: an index compared with itself (identity).
    s = diff_indexes(two_indexes["old"], two_indexes["old"])
    assert (s["pairs_added"], s["pairs_removed"], s["pairs_jaccard_changed"], s["churn_rate"]) == (0, 0, 0, 0.0)
    assert s["entities_changed"] == 0 and s["pairs_kept"] == len(_pairs(two_indexes["old"]))


def test_cli_json_and_bad_folder(two_indexes, tmp_path):
    runner = CliRunner()
    result = runner.invoke(app, ["diff", str(two_indexes["old"]), str(two_indexes["new"]), "--json"])
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout)
    # Oracle: brute force as above, for the two keys a nightly log reads.
    old, new = _pairs(two_indexes["old"]), _pairs(two_indexes["new"])
    assert (record["pairs_added"], record["pairs_removed"]) == (
        len(new.keys() - old.keys()), len(old.keys() - new.keys()))
    bad = runner.invoke(app, ["diff", str(tmp_path / "nowhere"), str(two_indexes["new"])])
    assert bad.exit_code == 2 and "nowhere: no such index folder" in bad.stderr
