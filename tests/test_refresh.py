"""lshjob refresh: a store of periods folded batch by batch gives, after every refresh, the
index lshjob run builds from the window's events with the same plan.

Oracles: the full run (:func:`lshjob.jobs.run.run_job`) on the window's events, cut from all
events delivered so far with polars in the test, with the kept perms, bands, rows, seed and
scheme; exact Jaccard of Python sets for every published pair; and the lock and catalog
checked from outside (a lock held by the test, the catalog read back).
"""

from __future__ import annotations

import json
from datetime import date

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.demo.generate import generate_events
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh
from lshjob.jobs.refresh import RefreshOptions, history, refresh_job
from lshjob.jobs.run import RunOptions, run_job
from lshjob.runtime.folder_lock import output_lock
from lshjob.store import catalog

SPEC = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
WINDOW = 3
THRESHOLD = 0.3
TOP_K = 8
FIRST_BATCH_MONTH = 3  # the first batch holds what arrived up to March; then one batch a month


@pytest.fixture(autouse=True)
def _update_at_any_share(monkeypatch):
    # The batches here touch a large share of a few hundred patrons: the update path under test
    # is kept for them (test_refresh_switch.py tests the switch at the real share).
    monkeypatch.setattr(refresh, "WHOLE_WINDOW_SHARE", 2.0)


def _library_batches(patrons: int = 100, seed: int = 11) -> tuple[list[pl.DataFrame], str, str]:
    """Loans of the library network, cut into the batches they arrive in (months 3 to 8):
    most arrive in their own month, some one or two months late (still in the window), a
    few five months late (older than the window: dropped). Two patrons with the same loans
    borrow only in January and February (they leave the window), two only from July on (new
    entities); each pair's members are each other's neighbours while in the window."""
    events, planted = generate_events(patrons, seed)
    events = events.select("patron", "title", "borrowed_at")
    members = planted.filter(pl.col("kind") == "group")["patron"].to_list()
    leaving, arriving = members[0], members[-1]
    month = pl.col("borrowed_at").dt.month()
    events = events.filter(((pl.col("patron") != leaving) | (month <= 2))
                           & ((pl.col("patron") != arriving) | (month >= 7)))
    lag = np.random.default_rng(seed).choice([0, 1, 2, 5], size=events.height, p=[0.8, 0.1, 0.06, 0.04])
    events = events.with_columns(arrival=(month + pl.Series(lag)).clip(FIRST_BATCH_MONTH))
    twins = events.filter(pl.col("patron").is_in([leaving, arriving])).with_columns(pl.col("patron") + "-twin")
    events = pl.concat([events, twins])
    batches = [events.filter(pl.col("arrival") == m).drop("arrival") for m in range(FIRST_BATCH_MONTH, 9)]
    return batches, leaving, arriving


def _window_events(delivered: pl.DataFrame) -> tuple[pl.DataFrame, date]:
    newest = delivered["borrowed_at"].dt.truncate("1mo").max().date()
    first = date(newest.year, newest.month - WINDOW + 1, 1)
    return delivered.filter(pl.col("borrowed_at").dt.date() >= first), first


def _full_run(events: pl.DataFrame, plan: dict, folder) -> pl.DataFrame:
    folder.mkdir(parents=True, exist_ok=True)
    events.write_parquet(folder / "window.parquet")
    run_job(folder / "window.parquet", EventSpec(entity="patron", element="title"),
            RunOptions(threshold=THRESHOLD, top_k=TOP_K, perms=plan["perms"], bands=plan["bands"],
                       rows=plan["rows"], seed=plan["seed"], scheme=plan["scheme"]), folder / "index")
    return pl.read_parquet(folder / "index" / "neighbours.parquet")


def _refresh(tmp_path, batch: pl.DataFrame, i: int, **kw) -> dict:
    path = tmp_path / f"batch-{i}.parquet"
    batch.write_parquet(path)
    options = RefreshOptions(window=WINDOW, threshold=THRESHOLD, top_k=TOP_K, **kw)
    return refresh_job(path, tmp_path / "store", SPEC, options, tmp_path / "index")


@pytest.mark.parametrize("full", [False, True], ids=["from-state", "full-run"])
def test_every_refresh_equals_the_full_run_on_the_window(tmp_path, full):
    # from-state: the index updated from the store's state (only touched entities read,
    # only pairs with a new set verified); full-run: lshjob run over the window each time.
    batches, leaving, arriving = _library_batches()
    delivered = pl.DataFrame(schema=batches[0].schema)
    seen_leaving = False
    sets_before: dict[str, set] = {}
    pairs_before: set[tuple[str, str]] = set()
    for i, batch in enumerate(batches):
        before_newest = delivered["borrowed_at"].max()
        delivered = pl.concat([delivered, batch])
        window, first = _window_events(delivered)
        manifest = _refresh(tmp_path, batch, i, full=full)
        assert manifest["refresh"]["design"] == (
            "full run over the window" if full else "incremental" if i else "state built from the whole window")
        published = pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
        # Oracle: lshjob run on the window's events with the kept plan, every column bit for bit
        expected = _full_run(window, manifest["plan"], tmp_path / f"oracle-{i}")
        assert published.equals(expected), f"batch {i}: refresh differs from the full run"
        assert published.height > 0
        # Oracle: events of the batch before the window, counted with polars
        older = batch.filter(pl.col("borrowed_at").dt.date() < first).height
        assert manifest["refresh"]["rows_older_than_window"] == older
        assert manifest["refresh"]["window_first"] == first.isoformat()
        # Oracle: Python sets of the window before and after; an entity changed if its set did
        sets_after = {p: set(t) for p, t in window.group_by("patron").agg("title").iter_rows()}
        changed = {e for e in sets_before.keys() | sets_after.keys() if sets_before.get(e) != sets_after.get(e)}
        assert manifest["refresh"]["changed_entities"] == len(changed)
        sets_before = sets_after
        # Oracle: unordered pairs of the published files, as Python sets
        pairs_after = {tuple(sorted(r)) for r in published.select("entity", "neighbour").iter_rows()}
        assert manifest["refresh"]["pairs_added"] == len(pairs_after - pairs_before)
        assert manifest["refresh"]["pairs_removed"] == len(pairs_before - pairs_after)
        pairs_before = pairs_after
        seen_leaving |= leaving in set(published["entity"])
        if before_newest is not None and first > date(2026, 2, 1):
            assert leaving not in set(published["entity"]) and leaving not in set(window["patron"])
        assert (arriving in set(window["patron"])) == (i >= 4)
        assert (arriving in set(published["entity"])) == (arriving in set(window["patron"]))
    assert seen_leaving, "the leaving patron was never indexed: the test data lost its point"
    assert sum(b.filter(pl.col("borrowed_at").dt.month() < 3).height for b in batches[1:]) > 0  # late, dropped
    runs = history(tmp_path / "store")["runs"]
    assert runs[0]["rebuilt"] and all(r["published"] for r in runs)
    plans = [[r["plan"][k] for k in ("perms", "bands", "rows", "seed", "scheme")] for r in runs]
    for before, after, run in zip(plans, plans[1:], runs[1:]):
        assert (before == after) or (run["rebuilt"] and "recall" in run["why"]), run["why"]


def test_published_jaccard_is_exact_set_jaccard(tmp_path):
    # Oracle: Jaccard of Python sets |A & B| / |A | B| of the window's titles, for every row.
    batches, _, _ = _library_batches(patrons=100, seed=3)
    for i, batch in enumerate(batches[:2]):
        _refresh(tmp_path, batch, i)
    window, _ = _window_events(pl.concat(batches[:2]))
    sets = {p: set(t) for p, t in window.group_by("patron").agg("title").iter_rows()}
    published = pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
    assert published.height > 0
    for a, b, j in published.select("entity", "neighbour", "jaccard").iter_rows():
        assert j == len(sets[a] & sets[b]) / len(sets[a] | sets[b])
        assert j >= THRESHOLD


def test_a_second_refresh_on_a_held_store_exits_75(tmp_path):
    batches, _, _ = _library_batches(patrons=100, seed=5)
    path = tmp_path / "batch.parquet"
    batches[0].write_parquet(path)
    (tmp_path / "store").mkdir()
    args = ["refresh", str(path), "--store", str(tmp_path / "store"), "--entity", "patron", "--element", "title",
            "--time", "borrowed_at", "--period", "month", "--window", "3", "--threshold", "0.3",
            "--out", str(tmp_path / "index")]
    with output_lock(tmp_path / "store", what="store"):  # as a refresh holding the store would
        result = CliRunner().invoke(app, args)
    assert result.exit_code == 75, result.output
    assert not (tmp_path / "index" / "neighbours.parquet").exists()
    assert CliRunner().invoke(app, [*args, "--quiet"]).exit_code == 0


def test_a_refresh_killed_before_the_catalog_leaves_the_store_readable(tmp_path, monkeypatch):
    batches, _, _ = _library_batches(patrons=100, seed=7)
    for i, batch in enumerate(batches[:2]):
        _refresh(tmp_path, batch, i)
    state = catalog.read_state(tmp_path / "store")
    index_before = (tmp_path / "index" / "neighbours.parquet").read_bytes()

    def killed(*args, **kwargs):
        raise RuntimeError("killed between the files and the catalog")

    with monkeypatch.context() as patched:
        patched.setattr(catalog, "commit", killed)
        with pytest.raises(RuntimeError):
            _refresh(tmp_path, batches[2], 2)
    # Oracle: the catalog read back, and the files it names with their SHA-256
    assert catalog.read_state(tmp_path / "store") == state
    assert (tmp_path / "index" / "neighbours.parquet").read_bytes() == index_before
    from lshjob.store.files import check_files
    assert check_files(tmp_path / "store", state) == []

    manifest = _refresh(tmp_path, batches[2], 2)  # the same batch again: folding twice changes nothing
    assert any("killed refresh" in w for w in manifest["warnings"])
    window, _ = _window_events(pl.concat(batches[:3]))
    expected = _full_run(window, manifest["plan"], tmp_path / "oracle")
    assert expected.height > 0
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)


def test_keep_retains_the_last_versions_and_history_lists_runs(tmp_path):
    batches, _, _ = _library_batches(patrons=100, seed=5)
    for i, batch in enumerate(batches[:4]):
        _refresh(tmp_path, batch, i, keep=2)
    found = history(tmp_path / "store")
    runs = found["runs"]
    assert len(runs) == 4
    assert [v["run_id"] for v in found["versions"]] == [r["run_id"] for r in runs[-2:]]
    kept = {p.name for p in (tmp_path / "store" / "versions").iterdir()}
    assert kept == {r["run_id"] for r in runs[-2:]}  # run ids of one second do not sort by time
    # Oracle: hashlib over the published file
    import hashlib
    digest = hashlib.sha256((tmp_path / "index" / "neighbours.parquet").read_bytes()).hexdigest()
    assert runs[-1]["output_sha256"] == digest
    result = CliRunner().invoke(app, ["history", str(tmp_path / "store"), "--json"])
    assert result.exit_code == 0, result.output
    assert [r["run_id"] for r in json.loads(result.output)["runs"]] == [r["run_id"] for r in runs]


@pytest.mark.parametrize("moment", ["index built"])  # the moment before the catalog; earlier: the test above
def test_a_refresh_killed_with_sigkill_leaves_store_and_index_consistent(tmp_path, moment):
    # Oracle: the catalog read back and its files' SHA-256; the index in place is one the
    # store published; after the kill the next refresh equals the full run on the window.
    import os
    import signal
    import subprocess
    import sys
    import time

    from lshjob.store.files import check_files

    batches, _, _ = _library_batches(patrons=100, seed=13)
    _refresh(tmp_path, batches[0], 0)
    before = catalog.read_state(tmp_path / "store")
    path = tmp_path / "batch-1.parquet"
    batches[1].write_parquet(path)
    args = [sys.executable, "-m", "lshjob.cli.app", "refresh", str(path), "--store", str(tmp_path / "store"),
            "--entity", "patron", "--element", "title", "--time", "borrowed_at", "--period", "month",
            "--window", str(WINDOW), "--threshold", str(THRESHOLD), "--top-k", str(TOP_K),
            "--out", str(tmp_path / "index"), "--quiet"]
    versions = tmp_path / "store" / "versions"
    reached = {"window composed": lambda: (tmp_path / "store" / "work" / "window.parquet").exists(),
               "index built": lambda: len(list(versions.iterdir())) > len(before.versions)}[moment]
    child = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while not reached() and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.001)
    os.kill(child.pid, signal.SIGKILL)
    assert child.wait() == -signal.SIGKILL, "the refresh ended before the moment: nothing was tested"
    after = catalog.read_state(tmp_path / "store")
    assert after == before or after.versions[-1].run_id not in {v.run_id for v in before.versions}
    assert check_files(tmp_path / "store", after) == []
    published = (tmp_path / "index" / "neighbours.parquet").read_bytes()
    kept = [(versions / v.folder / "neighbours.parquet").read_bytes() for v in after.versions + before.versions
            if (versions / v.folder).exists()]
    assert published in kept

    manifest = _refresh(tmp_path, batches[1], 1)
    window, _ = _window_events(pl.concat(batches[:2]))
    expected = _full_run(window, manifest["plan"], tmp_path / "oracle")
    assert expected.height > 0
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)


def test_period_signatures_fold_to_the_window_signature(tmp_path):
    # Oracle: the signature of each patron's window set, built from Python sets of the raw
    # events (sign_element_lists), equals the element-wise minimum of the store's period
    # signatures (MinHash of a union = minimum of the parts' MinHash: Broder 1997).
    from helpers import sign_element_lists

    from lshjob.sign.signatures import SignatureParams, signature_array

    batches, _, _ = _library_batches(patrons=100, seed=17)
    for i, batch in enumerate(batches[:3]):
        manifest = _refresh(tmp_path, batch, i)
    state = catalog.read_state(tmp_path / "store")
    # a period's signatures: its file and the delta files added since (catalog.signature_deltas)
    tables = [pl.read_parquet(tmp_path / "store" / f) for p in state.periods
              for f in (p.signatures_file, *p.signature_deltas)]
    assert any(p.signature_deltas for p in state.periods), "no period gained late events: nothing tested"
    stacked = pl.concat([t.select("entity", "signature") for t in tables])
    patrons = sorted(set(stacked["entity"]))
    folded = {}
    for entity, group in stacked.group_by("entity"):
        folded[entity[0]] = signature_array(group).min(axis=0)
    window, _ = _window_events(pl.concat(batches[:3]))
    sets = {p: sorted(set(t)) for p, t in window.group_by("patron").agg("title").iter_rows()}
    assert sorted(sets) == patrons
    plan = manifest["plan"]
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"])
    expected = sign_element_lists([sets[p] for p in patrons], params)
    assert np.array_equal(np.stack([folded[p] for p in patrons]), expected)


def test_config_file_and_refusals(tmp_path):
    # Oracle: the index the same refresh publishes from flags (row for row), and the exit
    # codes of lshjob.errors for bad options.
    batches, _, _ = _library_batches(patrons=100, seed=5)
    batches[0].write_parquet(tmp_path / "loans.parquet")
    (tmp_path / "nightly.toml").write_text(
        'events = "loans.parquet"\nstore = "store"\nout = "index"\nentity = "patron"\nelement = "title"\n'
        f'time = "borrowed_at"\nperiod = "month"\nwindow = {WINDOW}\nthreshold = {THRESHOLD}\ntop-k = {TOP_K}\n')
    result = CliRunner().invoke(app, ["refresh", "--config", str(tmp_path / "nightly.toml"), "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.output)["plan"]["scheme"] == "kperm"
    (tmp_path / "flags").mkdir()
    _refresh(tmp_path / "flags", batches[0], 0)
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(
        pl.read_parquet(tmp_path / "flags" / "index" / "neighbours.parquet"))
    week = CliRunner().invoke(app, ["refresh", "--config", str(tmp_path / "nightly.toml"), "--period", "week"])
    assert week.exit_code == 2 and "keeps month periods" in week.output
    (tmp_path / "bad.toml").write_text('windows = 3\n')
    bad = CliRunner().invoke(app, ["refresh", "--config", str(tmp_path / "bad.toml")])
    assert bad.exit_code == 2 and "unknown key 'windows'" in bad.output


def test_weekly_periods_with_integer_keys_equal_the_full_run(tmp_path):
    # Oracle: the full run on the events of the newest 4 ISO weeks (Monday starts, cut with
    # Python's datetime in the test), with the kept plan.
    from datetime import datetime, timedelta

    rng = np.random.default_rng(21)
    n = 6000
    start = datetime(2026, 3, 2)  # a Monday
    events = pl.DataFrame({"patron": rng.integers(0, 150, n), "title": rng.integers(0, 60, n),
                           "borrowed_at": [start + timedelta(hours=int(h)) for h in rng.integers(0, 24 * 7 * 9, n)]})
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="week")
    options = RefreshOptions(window=4, threshold=THRESHOLD, top_k=TOP_K)
    week = (pl.col("borrowed_at") - pl.lit(start)).dt.total_days() // 7
    for w in range(0, 9, 3):
        batch = events.filter((week >= w) & (week < w + 3))
        batch.write_parquet(tmp_path / f"w{w}.parquet")
        manifest = refresh_job(tmp_path / f"w{w}.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    first = start + timedelta(weeks=8 - 3)
    assert manifest["refresh"]["window_first"] == first.date().isoformat()
    window = events.filter(pl.col("borrowed_at") >= first)
    expected = _full_run(window, manifest["plan"], tmp_path / "oracle")
    assert expected.height > 0 and expected["entity"].dtype == pl.Int64
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)


def test_an_empty_batch_changes_nothing_and_exits_0(tmp_path):
    # Oracle: lshjob run on the window's events (cut with polars) with the kept plan, row for
    # row; the batch's rows counted by polars (zero).
    batches, _, _ = _library_batches(patrons=100, seed=19)
    for i, batch in enumerate(batches[:2]):
        _refresh(tmp_path, batch, i)
    before = pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
    empty = batches[0].clear()
    empty.write_parquet(tmp_path / "empty.parquet")
    args = ["refresh", str(tmp_path / "empty.parquet"), "--store", str(tmp_path / "store"), "--entity", "patron",
            "--element", "title", "--time", "borrowed_at", "--period", "month", "--window", str(WINDOW),
            "--threshold", str(THRESHOLD), "--top-k", str(TOP_K), "--out", str(tmp_path / "index"), "--json"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    manifest = json.loads(result.output)
    assert manifest["refresh"]["batch_rows"] == empty.height == 0
    assert manifest["refresh"]["pairs_added"] == manifest["refresh"]["pairs_removed"] == 0
    window, _ = _window_events(pl.concat(batches[:2]))
    expected = _full_run(window, manifest["plan"], tmp_path / "oracle")
    assert expected.height > 0
    published = pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
    assert published.equals(expected)
    assert published.equals(before)  # the same rows as the index before the empty batch
    assert len(history(tmp_path / "store")["runs"]) == 3
    # an empty batch into an empty store has nothing to index: refused (exit 2)
    first = CliRunner().invoke(app, [*args[:3], str(tmp_path / "new-store"), *args[4:-3], "--out",
                                     str(tmp_path / "new-index"), "--quiet"])
    assert first.exit_code == 2 and "no events" in first.output


def test_each_refresh_records_its_diff_summary_in_the_history(tmp_path):
    # Oracle: Python sets of unordered pairs {a, b} (with their Jaccard) of the two kept
    # versions' neighbours.parquet; and lshjob diff run on the two folders afterwards.
    from lshjob.jobs.diff import diff_indexes

    batches, _, _ = _library_batches(patrons=100, seed=23)
    for i, batch in enumerate(batches[:4]):
        _refresh(tmp_path, batch, i, keep=3)
    found = history(tmp_path / "store")
    runs = {r["run_id"]: r for r in found["runs"]}
    assert found["runs"][0]["diff"] is None  # the first refresh has no version before it
    folders = [v["folder"] for v in found["versions"]]
    assert len(folders) == 3

    def pairs(folder) -> dict:
        rows = pl.read_parquet(f"{folder}/neighbours.parquet").select("entity", "neighbour", "jaccard").iter_rows()
        return {tuple(sorted((a, b))): j for a, b, j in rows}

    for old, new in zip(found["versions"], found["versions"][1:]):
        recorded = runs[new["run_id"]]["diff"]
        before, after = pairs(old["folder"]), pairs(new["folder"])
        both = before.keys() & after.keys()
        assert recorded["old_run_id"] == old["run_id"]
        assert recorded["pairs_added"] == len(after.keys() - before.keys()) == runs[new["run_id"]]["pairs_added"]
        assert recorded["pairs_removed"] == len(before.keys() - after.keys()) == runs[new["run_id"]]["pairs_removed"]
        assert recorded["pairs_jaccard_changed"] == sum(before[p] != after[p] for p in both)
        either = len(before.keys() | after.keys())
        assert recorded["churn_rate"] == pytest.approx(len(before.keys() ^ after.keys()) / either)
        assert recorded["pairs_added"] + recorded["pairs_removed"] > 0  # the batches changed the pairs
        again = diff_indexes(old["folder"], new["folder"])
        assert {k: again[k] for k in recorded if k != "old_run_id"} == {k: v for k, v in recorded.items()
                                                                        if k != "old_run_id"}
    text = CliRunner().invoke(app, ["history", str(tmp_path / "store")])
    assert text.exit_code == 0, text.output
    last = found["runs"][-1]
    line = next(x for x in text.output.splitlines() if x.startswith(last["run_id"]))
    # columns: run, started, window (first .. last), batch, changed, added, removed, ...
    assert line.split()[7:9] == [str(last["pairs_added"]), str(last["pairs_removed"])]
    assert "added" in text.output.splitlines()[0] and "removed" in text.output.splitlines()[0]


def test_a_store_made_before_the_diff_column_reads_and_refreshes(tmp_path):
    # Oracle: the catalog's runs table read back with DuckDB after the column is dropped (a
    # store made before runs recorded their diff), and the diff recomputed with Python sets.
    import duckdb

    batches, _, _ = _library_batches(patrons=100, seed=29)
    _refresh(tmp_path, batches[0], 0)
    with duckdb.connect(str(tmp_path / "store" / catalog.CATALOG)) as con:
        con.execute("ALTER TABLE runs DROP COLUMN diff")
    assert [r["diff"] for r in history(tmp_path / "store")["runs"]] == [None]
    before = {tuple(sorted(r)) for r in pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
              .select("entity", "neighbour").iter_rows()}
    _refresh(tmp_path, batches[1], 1)
    after = {tuple(sorted(r)) for r in pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
             .select("entity", "neighbour").iter_rows()}
    runs = history(tmp_path / "store")["runs"]
    assert runs[0]["diff"] is None
    assert runs[1]["diff"]["pairs_added"] == len(after - before)
    assert runs[1]["diff"]["pairs_removed"] == len(before - after)


def test_recall_of_lists_plans_the_window_as_lshjob_run_does(tmp_path):
    # Oracle: lshjob run over the window's events with the same options (--recall-of lists, a
    # planner sample smaller than the window, so the lists' recall is predicted): the same
    # plan, the same rows; and the exit code of lshjob.errors for a value outside the choices.
    batches, _, _ = _library_batches(patrons=300, seed=7)
    manifest = _refresh(tmp_path, batches[0], 0, recall_of="lists", sample_size=120)
    predicted = manifest["plan"]["predicted"]
    assert predicted["expected_list_recall"] is not None and predicted["expected_list_recall"] >= 0.95
    window, _ = _window_events(batches[0])
    window.write_parquet(tmp_path / "window.parquet")
    ran = run_job(tmp_path / "window.parquet", EventSpec(entity="patron", element="title"),
                  RunOptions(threshold=THRESHOLD, top_k=TOP_K, recall_of="lists", sample_size=120), tmp_path / "ran")
    assert [manifest["plan"][k] for k in ("perms", "bands", "rows")] == [ran["plan"][k] for k in ("perms", "bands",
                                                                                                  "rows")]
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(
        pl.read_parquet(tmp_path / "ran" / "neighbours.parquet"))
    (tmp_path / "pairs").mkdir()
    pairs = _refresh(tmp_path / "pairs", batches[0], 0, sample_size=120)
    assert pairs["plan"]["predicted"].get("expected_list_recall") is None  # the default plans on pairs
    bad = CliRunner().invoke(app, ["refresh", str(tmp_path / "batch-0.parquet"), "--store", str(tmp_path / "s2"),
                                   "--entity", "patron", "--element", "title", "--time", "borrowed_at", "--period",
                                   "month", "--window", "3", "--threshold", "0.3", "--out", str(tmp_path / "i2"),
                                   "--recall-of", "neighbours"])
    assert bad.exit_code == 2 and "recall" in bad.output and "neighbours" in bad.output, bad.output
