"""lshjob drift --store: the flagged rows' elements that entered and left, and their exact
similarity and containment, from a store written by lshjob refresh."""

import datetime as dt
import html
import json

import polars as pl
import pytest
from drift_data import library_months
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.refresh import RefreshOptions, refresh_job
from lshjob.jobs.sign import sign_file
from lshjob.report.drift_html import _exact_part
from lshjob.sign.signatures import SignatureParams

SPEC = EventSpec(entity="patron", element="author", time="borrowed_at", period="month")
HISTORY = 3
runner = CliRunner()


@pytest.fixture(scope="module")
def signed(tmp_path_factory):
    """(folder, events): 300 patrons over 8 months, a fifth of them drifting; signed per month,
    and refreshed into two stores: one holding all 8 months, one the last 4."""
    folder = tmp_path_factory.mktemp("drift-store")
    events, _ = library_months(300, 8, drift_rate=0.2, seed=31, first_change=3)
    events.write_parquet(folder / "events.parquet")
    sign_file(folder / "events.parquet", folder / "monthly.parquet", SPEC, SignatureParams())
    for name, window in (("store", 8), ("short", 4)):
        refresh_job(folder / "events.parquet", folder / name, SPEC, RefreshOptions(window=window, threshold=0.5),
                    folder / f"index-{name}")
    return folder, events


def _sets(events: pl.DataFrame) -> dict:
    """{(patron, month start): set of authors}, in Python."""
    found: dict = {}
    for patron, author, day in events.iter_rows():
        found.setdefault((patron, day.replace(day=1)), set()).add(author)
    return found


def _months_before(period: dt.date, n: int) -> list[dt.date]:
    return [dt.date(period.year + (period.month - 1 - i) // 12, (period.month - 1 - i) % 12 + 1, 1)
            for i in range(1, n + 1)]


def test_flagged_rows_name_what_entered_and_left_and_match_python_sets(signed):
    # Oracle: Python sets of each patron's authors per month (from the events, not the
    # store): entered = now - compared period, left = compared period - now, exact Jaccard and
    # containment in the union of the 3 months before; estimates within 3 binomial s.d.
    folder, events = signed
    result = runner.invoke(app, ["drift", str(folder / "monthly.parquet"), "--store", str(folder / "store"),
                                 "--out", str(folder / "d.parquet"), "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    rows = pl.read_parquet(folder / "d.parquet")
    sets = _sets(events)
    flagged = rows.filter("flagged")
    assert flagged.height >= 20
    ex = summary["exact"]
    assert ex["checked"] == ex["flagged_rows"] == flagged.height and ex["not_in_store"] == 0
    assert ex["set_size_differs"] == 0 and ex["element"] == "author"
    for row in flagged.iter_rows(named=True):
        now = sets[(row["entity"], row["period"])]
        before = sets[(row["entity"], row["compared_with"])]
        past = set().union(*(sets.get((row["entity"], p), set()) for p in _months_before(row["period"], HISTORY)))
        assert row["entered"] == sorted(now - before) and row["left"] == sorted(before - now)
        assert row["similarity_exact"] == len(now & before) / len(now | before)
        assert row["containment_exact"] == len(now & past) / len(now)
    others = rows.filter(~pl.col("flagged"))
    assert others["similarity_exact"].null_count() == others.height and others["entered"].null_count() == others.height
    # the estimates agree with the exact values within the stated error (3 s.d.) for nearly all
    assert ex["within_error"]["similarity"] >= 0.95 * ex["checked"]
    assert ex["within_error"]["containment"] >= 0.95 * ex["checked"]
    listed = ex["rows"][0]
    assert listed["score"] == flagged["score"].max() and listed["entered_count"] == len(
        flagged.sort("score", descending=True)["entered"][0])
    page = _exact_part(ex, html.escape, lambda v: "" if v is None else f"{v:.3f}")  # the HTML view's section
    assert "Flagged sets in the store" in page and html.escape(", ".join(listed["entered"])) in page


def test_rows_whose_history_left_the_window_are_not_checked(signed):
    # Oracle: the store's window (the last 4 months: May to August, refresh's --window 4);
    # a flagged row is checked only when its month, the month compared with and every month
    # of its history holding a set are in the window (Python over the flagged rows).
    folder, events = signed
    result = runner.invoke(app, ["drift", str(folder / "monthly.parquet"), "--store", str(folder / "short"),
                                 "--out", str(folder / "d-short.parquet"), "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    rows = pl.read_parquet(folder / "d-short.parquet")
    sets = _sets(events)
    first = dt.date(2026, 5, 1)
    expect = 0
    for row in rows.filter("flagged").iter_rows(named=True):
        months = [p for p in _months_before(row["period"], HISTORY) if (row["entity"], p) in sets] + [row["period"]]
        inside = min(months) >= first
        expect += inside
        assert (row["similarity_exact"] is not None) == inside
    assert summary["exact"]["checked"] == expect and summary["exact"]["not_in_store"] == rows["flagged"].sum() - expect
    assert any("not all in the store's window" in w for w in summary["warnings"])


def test_store_refusals(signed, tmp_path):
    folder, events = signed
    runs = {
        "not a store": ["--store", str(tmp_path)],
        "segments": ["--store", str(folder / "store")],
    }
    seg = events.with_columns(branch=pl.lit("Harbour"))
    seg.write_parquet(tmp_path / "seg.parquet")
    sign_file(tmp_path / "seg.parquet", tmp_path / "seg-sigs.parquet",
              EventSpec(entity="patron", element="author", segment="branch", time="borrowed_at", period="month"))
    weekly = tmp_path / "weekly.parquet"
    sign_file(folder / "events.parquet", weekly,
              EventSpec(entity="patron", element="author", time="borrowed_at", period="week"))
    cases = [(folder / "monthly.parquet", runs["not a store"], "no catalog.duckdb"),
             (tmp_path / "seg-sigs.parquet", runs["segments"], "not per segment"),
             (weekly, runs["segments"], "keeps month periods")]
    for source, extra, message in cases:
        result = runner.invoke(app, ["drift", str(source), *extra, "--out", str(tmp_path / "x.parquet")])
        assert result.exit_code == 2 and message in result.stderr, (message, result.output)
        assert not (tmp_path / "x.parquet").exists()


def test_the_store_gives_the_neighbour_signal_from_its_last_two_versions(tmp_path):
    # Oracle: Python sets of each patron's published neighbours in the store's last two index
    # versions (read from their Parquet files, not through lshjob diff)
    events, _ = library_months(200, 6, drift_rate=0.2, seed=5, first_change=3)
    month = pl.col("borrowed_at").dt.month()
    first, rest = events.filter(month <= 4), events.filter(month > 4)
    for i, batch in enumerate((first, rest)):
        batch.write_parquet(tmp_path / f"batch-{i}.parquet")
        refresh_job(tmp_path / f"batch-{i}.parquet", tmp_path / "store", SPEC, RefreshOptions(window=6, threshold=0.3),
                    tmp_path / "index")
    events.write_parquet(tmp_path / "events.parquet")
    sign_file(tmp_path / "events.parquet", tmp_path / "monthly.parquet", SPEC, SignatureParams())
    result = runner.invoke(app, ["drift", str(tmp_path / "monthly.parquet"), "--store", str(tmp_path / "store"),
                                 "--out", str(tmp_path / "d.parquet"), "--json"])
    assert result.exit_code == 0, result.output
    signal = json.loads(result.stdout)["neighbour_drift"]
    versions = sorted((tmp_path / "store" / "versions").iterdir(), key=lambda p: p.stat().st_mtime)[-2:]
    lists = []
    for folder in versions:
        rows = pl.read_parquet(folder / "neighbours.parquet")
        found: dict = {}
        for entity, neighbour in rows.select("entity", "neighbour").iter_rows():
            found.setdefault(entity, set()).add(neighbour)
        lists.append(found)
    changed = {e for e in lists[0].keys() | lists[1].keys() if lists[0].get(e, set()) != lists[1].get(e, set())}
    assert signal["entities_list_changed"] == len(changed) > 0
    assert "versions" in signal["source"]
