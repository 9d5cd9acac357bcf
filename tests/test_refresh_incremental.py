"""lshjob refresh from the store's state of the last index (lshjob.jobs.refresh_index).

Oracles: the full run (:func:`lshjob.jobs.run.run_job`) on the window's events cut with
polars in the test, with the kept plan, every column bit for bit; MinHash algebra (the
signature of a union is the element-wise minimum of the parts' signatures: Broder 1997;
for one permutation hashing, before densification: Li, Owen and Zhang 2012) against the
signature of the union signed directly from Python sets; and the planner's recall formula
1 - (1 - s^r)^b (Mining of Massive Datasets, section 3.4) over the exact pair histogram of
the window, computed here with Python sets.
"""

from __future__ import annotations

from datetime import date, datetime, timedelta

import numpy as np
import polars as pl
import pytest
from helpers import sign_element_lists

from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh
from lshjob.jobs.refresh import RECALL_SLACK, RefreshOptions, history, refresh_job
from lshjob.jobs.refresh_index import compose_signatures
from lshjob.jobs.run import RunOptions, run_job
from lshjob.sign.signatures import SignatureParams, comparable, signature_array
from lshjob.sign.slices import sign_sets


@pytest.fixture(autouse=True)
def _update_at_any_share(monkeypatch):
    # The batches here touch a large share of a few hundred patrons: the update path under test
    # is kept for them (test_refresh_switch.py tests the switch at the real share).
    monkeypatch.setattr(refresh, "WHOLE_WINDOW_SHARE", 2.0)


def _full_run(events: pl.DataFrame, plan: dict, folder, threshold: float, top_k: int, **kw) -> pl.DataFrame:
    folder.mkdir(parents=True, exist_ok=True)
    events.write_parquet(folder / "window.parquet")
    run_job(folder / "window.parquet", EventSpec(entity="patron", element="title"),
            RunOptions(threshold=threshold, top_k=top_k, perms=plan["perms"], bands=plan["bands"], rows=plan["rows"],
                       seed=plan["seed"], scheme=plan["scheme"], **kw), folder / "index")
    return pl.read_parquet(folder / "index" / "neighbours.parquet")


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_the_minimum_over_period_signatures_is_the_signature_of_the_union(scheme):
    # Oracle: the union's signature signed directly from Python sets (sign_element_lists);
    # for oph the raw (empty-bin) form composes, and densifying after composing equals
    # densifying the union's signature.
    rng = np.random.default_rng(5)
    params = SignatureParams(scheme=scheme, perms=64, seed=9)
    periods = []
    for _ in range(4):
        rows = pl.DataFrame({"entity": rng.integers(0, 40, 300), "element": rng.integers(0, 500, 300)})
        periods.append(rows.unique().with_columns(pl.col("element").cast(pl.String)).sort("entity", "element"))
    composed = compose_signatures([sign_sets(p, ["entity"], params) for p in periods])
    union = pl.concat(periods).group_by("entity").agg("element").sort("entity")
    expected = sign_element_lists([sorted(set(e)) for e in union["element"].to_list()], params)
    assert composed["entity"].to_list() == union["entity"].to_list()
    assert np.array_equal(signature_array(composed), expected)
    assert np.array_equal(comparable(signature_array(composed), params), comparable(expected, params))


def test_a_daily_window_over_daily_periods_equals_the_full_run_as_days_expire(tmp_path):
    # Oracle: the full run on the events of the newest 3 days (cut with Python's datetime).
    rng = np.random.default_rng(23)
    n = 4000
    start = datetime(2026, 5, 1)
    events = pl.DataFrame({"patron": rng.integers(0, 120, n), "title": rng.integers(0, 40, n).astype(str),
                           "borrowed_at": [start + timedelta(minutes=int(m)) for m in rng.integers(0, 60 * 24 * 7, n)]})
    events = events.with_columns(pl.col("title").cast(pl.String))
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="day")
    options = RefreshOptions(window=3, threshold=0.25, top_k=5)
    designs = []
    for day in range(7):
        batch = events.filter(pl.col("borrowed_at").dt.date() == (start + timedelta(days=day)).date())
        batch.write_parquet(tmp_path / f"d{day}.parquet")
        manifest = refresh_job(tmp_path / f"d{day}.parquet", tmp_path / "store", spec, options, tmp_path / "index")
        designs.append(manifest["refresh"]["design"])
        first = start + timedelta(days=max(0, day - 2))
        last = start + timedelta(days=day + 1)
        window = events.filter((pl.col("borrowed_at") >= first) & (pl.col("borrowed_at") < last))
        expected = _full_run(window, manifest["plan"], tmp_path / f"oracle-{day}", 0.25, 5)
        assert expected.height > 0
        assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected), f"day {day}"
        if day >= 3:
            assert manifest["refresh"]["periods_expired"] == 1
    assert designs[1:] == ["incremental"] * 6


def _pairs_batch(month: int, pairs: int, shared: int, size: int, offset: int) -> pl.DataFrame:
    """``pairs`` pairs of patrons; the two of a pair share ``shared`` of their ``size`` titles,
    titles of different pairs never meet (Jaccard shared / (2 size - shared))."""
    rows = []
    for p in range(pairs):
        base = offset + p * 2 * size
        common = [f"t{base + i}" for i in range(shared)]
        for side in range(2):
            own = [f"t{base + size + side * size + i}" for i in range(size - shared)]
            rows += [(f"p{offset + p}-{side}", t) for t in common + own]
    patrons, titles = zip(*rows)
    return pl.DataFrame({"patron": list(patrons), "title": list(titles),
                         "borrowed_at": [datetime(2026, month, 10)] * len(rows)})


def _exact_recall(events: pl.DataFrame, threshold: float, bands: int, rows: int) -> float:
    """1 - (1 - s^r)^b averaged over the pairs at or above the threshold, s each pair's
    exact Jaccard (Python sets) binned as the planner bins them (1000 bins, the bin's mean;
    identical sets apart), or the uniform basis when fewer than 20 such pairs."""
    sets = {p: set(t) for p, t in events.group_by("patron").agg("title").iter_rows()}
    keys = sorted(sets)
    sims = [len(sets[a] & sets[b]) / len(sets[a] | sets[b]) for i, a in enumerate(keys) for b in keys[i + 1:]]
    bins: dict[tuple[int, bool], list[float]] = {}
    for s in sims:
        if s < 1.0:
            bins.setdefault((min(int(s * 1000), 999), s >= threshold), []).append(s)
    above = [(len(v), sum(v) / len(v)) for (_, side), v in bins.items() if side]
    assert sum(c for c, _ in above) >= 20, "the test data must hold 20 pairs above the threshold"
    total = sum(c for c, _ in above)
    return sum(c * (1 - (1 - m ** rows) ** bands) for c, m in above) / total


def test_a_batch_that_shifts_the_similarities_re_plans_and_rebuilds(tmp_path, capsys):
    # Month 1: 30 pairs of near-copies (Jaccard 0.9); month 2 (the window is one month, so
    # month 1 expires): 30 pairs just above the threshold (Jaccard 0.52). The plan kept from
    # month 1 is steep near 0.9; its recall on month 2's sample, by the planner's formula over
    # the exact histogram, decides: below the target less the slack, the refresh re-plans.
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    options = RefreshOptions(window=1, threshold=0.5, top_k=3)
    near = _pairs_batch(1, 30, 19, 20, 0)       # 19 / 21 = 0.905
    weak = _pairs_batch(2, 30, 14, 20, 1000)    # 14 / 26 = 0.538
    near.write_parquet(tmp_path / "m1.parquet")
    weak.write_parquet(tmp_path / "m2.parquet")
    first = refresh_job(tmp_path / "m1.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    kept = first["plan"]
    second = refresh_job(tmp_path / "m2.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    oracle = _exact_recall(weak, 0.5, kept["bands"], kept["rows"])
    steps = second["refresh"]["steps"]
    assert steps["sampled_recall"] == pytest.approx(oracle, abs=1e-9)
    assert oracle < options.recall - RECALL_SLACK, "the batch must shift the recall below the target"
    assert second["refresh"]["rebuilt"] and "re-planned" in second["refresh"]["why"]
    assert second["refresh"]["design"] == "state built from the whole window"
    assert "re-planned" in capsys.readouterr().err
    assert "re-planned" in history(tmp_path / "store")["runs"][-1]["why"]
    assert (second["plan"]["bands"], second["plan"]["rows"]) != (kept["bands"], kept["rows"])
    expected = _full_run(weak, second["plan"], tmp_path / "oracle", 0.5, 3)
    # the new plan finds most weak pairs (both directions); the kept one about a tenth of them
    assert expected.height >= 0.9 * 60 > 3 * oracle * 60
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)
    # a batch that keeps the distribution keeps the plan (its recall: the same oracle)
    more = _pairs_batch(2, 30, 14, 20, 5000)
    more.write_parquet(tmp_path / "m2b.parquet")
    third = refresh_job(tmp_path / "m2b.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    both = pl.concat([weak, more])
    recall = _exact_recall(both, 0.5, second["plan"]["bands"], second["plan"]["rows"])
    assert third["refresh"]["steps"]["sampled_recall"] == pytest.approx(recall, abs=1e-9)
    assert recall >= options.recall - RECALL_SLACK and not third["refresh"]["rebuilt"]
    assert third["refresh"]["design"] == "incremental"


def test_a_bucket_over_the_cap_falls_back_to_the_full_run(tmp_path):
    # Oracle: the full run with the same --max-bucket on the window's events. Six patrons
    # share 19 of 20 titles: a new one joins their buckets and takes them over the cap of 4.
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    options = RefreshOptions(window=2, threshold=0.5, top_k=3, max_bucket=4)
    base = _pairs_batch(1, 20, 12, 20, 0)
    base.write_parquet(tmp_path / "m1.parquet")
    first = refresh_job(tmp_path / "m1.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    assert first["refresh"]["design"] == "state built from the whole window"
    common = [f"c{i}" for i in range(19)]
    crowd = pl.DataFrame({"patron": [f"q{j}" for j in range(6) for _ in range(20)],
                          "title": [t for j in range(6) for t in common + [f"own{j}"]],
                          "borrowed_at": [datetime(2026, 1, 20)] * 120})
    crowd.write_parquet(tmp_path / "late.parquet")
    second = refresh_job(tmp_path / "late.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    assert second["refresh"]["design"] == "full run over the window"
    assert any("--max-bucket 4" in w for w in second["warnings"])
    expected = _full_run(pl.concat([base, crowd]), second["plan"], tmp_path / "oracle", 0.5, 3, max_bucket=4)
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)
    assert date.fromisoformat(second["refresh"]["window_first"]) == date(2025, 12, 1)


def test_many_late_batches_fold_their_files_and_still_equal_the_full_run(tmp_path, monkeypatch):
    # Five late batches into one month, with the limits lowered to 3 files: the period's
    # signature delta files and the state's bucket files pass them and are folded into one. Oracles: the full run on the
    # window's events; each period's signature (the minimum over its files) against the
    # signature of the period's set signed directly from Python sets.
    from lshjob.jobs import refresh_fold, refresh_index, refresh_store
    from lshjob.store import catalog

    monkeypatch.setattr(refresh_store, "MAX_SIGNATURE_DELTAS", 3)
    monkeypatch.setattr(refresh_index, "COMPACT_AFTER", 3)
    monkeypatch.setattr(refresh_fold, "MAX_SET_DELTAS", 3)
    rng = np.random.default_rng(31)
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    options = RefreshOptions(window=2, threshold=0.3, top_k=4)
    base = pl.DataFrame({"patron": rng.integers(0, 40, 600).astype(str), "title": rng.integers(0, 60, 600).astype(str),
                         "borrowed_at": [datetime(2026, 3, 1 + int(d)) for d in rng.integers(0, 28, 600)]})
    delivered = [base]
    base.write_parquet(tmp_path / "b0.parquet")
    manifest = refresh_job(tmp_path / "b0.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    for i in range(1, 6):
        late = pl.DataFrame({"patron": rng.integers(0, 45, 6).astype(str), "title": rng.integers(0, 60, 6).astype(str),
                             "borrowed_at": [datetime(2026, 3, 5)] * 6})
        delivered.append(late)
        late.write_parquet(tmp_path / f"b{i}.parquet")
        manifest = refresh_job(tmp_path / f"b{i}.parquet", tmp_path / "store", spec, options, tmp_path / "index")
        assert manifest["refresh"]["design"] == "incremental"
    window = pl.concat(delivered)
    expected = _full_run(window, manifest["plan"], tmp_path / "oracle", 0.3, 4)
    assert expected.height > 0
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").equals(expected)
    state = catalog.read_state(tmp_path / "store")
    (period,) = state.periods
    assert 0 < len(period.signature_deltas) < 3  # folded into one file once, then grown again
    tables = [pl.read_parquet(tmp_path / "store" / f) for f in (period.signatures_file, *period.signature_deltas)]
    stacked = pl.concat([t.select("entity", "signature") for t in tables])
    folded = {e[0]: signature_array(g).min(axis=0) for e, g in stacked.group_by("entity")}
    sets = {p: sorted(set(t)) for p, t in window.group_by("patron").agg("title").iter_rows()}
    plan = manifest["plan"]
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"])
    keys = sorted(sets)
    assert sorted(folded) == keys
    assert np.array_equal(np.stack([folded[k] for k in keys]), sign_element_lists([sets[k] for k in keys], params))
    buckets = [f for f in state.files if f.kind == "buckets"]
    assert 1 <= len(buckets) < 5


def test_the_command_line_full_flag_runs_the_whole_job_with_the_same_rows(tmp_path):
    # Oracle: the index the state's path published for the same batches (row for row).
    import json

    from typer.testing import CliRunner

    from lshjob.cli.app import app

    first, second = _pairs_batch(1, 25, 15, 20, 0), _pairs_batch(2, 25, 15, 20, 100)
    first.write_parquet(tmp_path / "m1.parquet")
    second.write_parquet(tmp_path / "m2.parquet")
    found = {}
    for name, extra in (("state", []), ("full", ["--full"])):
        for batch in ("m1", "m2"):
            args = ["refresh", str(tmp_path / f"{batch}.parquet"), "--store", str(tmp_path / f"store-{name}"),
                    "--entity", "patron", "--element", "title", "--time", "borrowed_at", "--period", "month",
                    "--window", "2", "--threshold", "0.5", "--top-k", "3", "--out", str(tmp_path / f"index-{name}"),
                    "--json", *extra]
            result = CliRunner().invoke(app, args)
            assert result.exit_code == 0, result.output
        found[name] = json.loads(result.stdout)
    assert found["state"]["refresh"]["design"] == "incremental"
    assert found["full"]["refresh"]["design"] == "full run over the window"
    for key in ("perms", "bands", "rows", "seed", "scheme"):
        assert found["state"]["plan"][key] == found["full"]["plan"][key]
    assert pl.read_parquet(tmp_path / "index-state" / "neighbours.parquet").equals(
        pl.read_parquet(tmp_path / "index-full" / "neighbours.parquet"))
    help_text = CliRunner().invoke(app, ["refresh", "--help"]).output
    assert "--full" in help_text
