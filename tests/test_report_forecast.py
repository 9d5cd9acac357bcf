"""The forecast on the pages: the index report's curves against N with the run as a point and
its per-stage table beside the manifest, a store's history, and lshjob plan --report."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.cli.report_command import write_report
from lshjob.demo.generate import generate_events
from lshjob.index.publish import read_manifest
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.refresh import RefreshOptions, history, refresh_job
from lshjob.jobs.report import CURVE_FACTORS
from lshjob.jobs.run import RunOptions, run_job
from lshjob.plan.scaling import shlosser_distinct

runner = CliRunner()


@pytest.fixture(autouse=True)
def own_cache(tmp_path, monkeypatch):
    monkeypatch.delenv("LSHJOB_COST_MODEL", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """Two refreshes of the library demo (loans up to May, then June), a store and its index;
    whole runs over the window (--full), whose counts the forecast compares against."""
    folder = tmp_path_factory.mktemp("store")
    events, _ = generate_events(120, seed=3)
    events = events.select("patron", "title", "borrowed_at")
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    month = pl.col("borrowed_at").dt.month()
    for i, batch in enumerate([events.filter(month <= 5), events.filter(month == 6)]):
        batch.write_parquet(folder / f"batch-{i}.parquet")
        refresh_job(folder / f"batch-{i}.parquet", folder / "store", spec,
                    RefreshOptions(window=3, threshold=0.3, top_k=5, full=True), folder / "index")
    return folder


def _data(text: str, figure: str, key: str) -> list:
    found = re.search(rf'<figure class="figure" id="figure-{figure}"[^>]*data-{key}="([^"]*)"', text)
    return json.loads(found.group(1).replace("&quot;", '"'))


def test_forecast_section_shows_the_run_beside_the_model_and_the_history(store, tmp_path):
    summary = write_report(store / "index", tmp_path / "r.html", sample=False, store=store / "store")
    text = (tmp_path / "r.html").read_text()
    m = read_manifest(store / "index")
    assert summary["forecast"] is True and summary["history_runs"] == 2
    # Oracle: the manifest's own figures in the measured column; the sizes drawn are the run's
    # entity count times the factors; time, memory and disk do not fall as N grows.
    table = re.search(r'<table id="forecast-table">(.*?)</table>', text, flags=re.S).group(1)
    measured = dict(re.findall(r'<tr><td class="name">([^<]+)</td><td>[^<]+</td><td>([^<]+)</td>', table))
    assert {k: float(v) for k, v in measured.items()} == pytest.approx(
        {k: round(v, 2) for k, v in m.seconds.items() if k != "refresh"}, abs=0.006)  # refresh's: a dict
    n = _data(text, "forecast", "n")
    assert n == pytest.approx([m.counts["entities"] * f for f in CURVE_FACTORS])
    for key in ("seconds", "memory_gib", "disk_gib"):
        assert np.all(np.diff(_data(text, "forecast", key)) >= -1e-12)
    # Oracle: the store's catalog read back by lshjob history's function.
    runs = history(store / "store")["runs"]
    hist = re.search(r'<table id="history-table">(.*?)</table>', text, flags=re.S).group(1)
    assert [r["run_id"] for r in runs] == re.findall(r'<tr><td class="name">([^<]+)</td>', hist)
    for svg in re.findall(r"<svg\b.*?</svg>", text, flags=re.S):
        assert ET.fromstring(svg).tag == "{http://www.w3.org/2000/svg}svg"


def test_report_without_a_store_says_there_is_no_history(store, tmp_path):
    write_report(store / "index", tmp_path / "r.html", sample=False)
    assert "No store given" in (tmp_path / "r.html").read_text()


def test_plan_report_page_holds_the_forecast_and_runners_up(tmp_path):
    events, _ = generate_events(300, seed=5)
    events.write_parquet(tmp_path / "loans.parquet")
    run_job(tmp_path / "loans.parquet", EventSpec(entity="patron", element="title"), RunOptions(threshold=0.5),
            tmp_path / "idx")
    out = runner.invoke(app, ["plan", "--threshold", "0.5", "--sample", str(tmp_path / "loans.parquet"),
                              "--entity", "patron", "--element", "title", "--entities", "3000",
                              "--history", str(tmp_path / "idx"), "--report", str(tmp_path / "plan.html"), "--json"])
    assert out.exit_code == 0, out.output
    summary = json.loads(out.output)
    text = (tmp_path / "plan.html").read_text()
    fc = summary["forecast"]
    # Oracle: the JSON lshjob plan printed, shown on the page; the history run corrects the pairs
    # by its measured / predicted counts (the manifest).
    m = read_manifest(tmp_path / "idx")
    assert fc["pair_corrections"]["candidate_pairs"] == pytest.approx(
        m.counts["candidate_pairs"] / m.plan["predicted"]["expected_candidates"])
    # The history run is of the sample (300 of 3,000 entities): the forecast is scaled from it,
    # its distinct sets at 3,000 by Shlosser's estimator over how often each distinct set occurs
    # in the sample (the sets grouped here with polars, apart from lshjob's collapse).
    assert fc["method"] == "scaled from 1 run(s) of the sample"
    sets = events.group_by("patron").agg(pl.col("title").unique().sort())
    occurs = sets.group_by("title").len()["len"].to_numpy()
    assert fc["counts"]["representatives"] == round(shlosser_distinct(occurs, 300 / 3000))
    assert f"{fc['seconds']['total']:.2f}" in text
    rows = re.search(r'<table id="runners-table">(.*?)</table>', text, flags=re.S).group(1)
    assert len(re.findall("<tr>", rows)) == 1 + 1 + len(fc["runners_up"])
    assert _data(text, "forecast", "n") == pytest.approx([3000 * f for f in CURVE_FACTORS])
    assert not re.findall(r"https?://(?!www\.w3\.org/)", text)  # self-contained: no address but SVG's names
    bad = runner.invoke(app, ["plan", "--threshold", "0.5", "--report", str(tmp_path / "plan.txt")])
    assert bad.exit_code == 2 and "--report must end in .html" in bad.output


def test_an_index_updated_from_the_store_state_has_no_forecast_and_says_why(tmp_path):
    # an incremental refresh reads only the touched entities: its manifest has no window-wide
    # event count (oracle: the manifest itself), so the page says why there is no forecast
    events, _ = generate_events(120, seed=3)
    events = events.select("patron", "title", "borrowed_at")
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    month = pl.col("borrowed_at").dt.month()
    first = events.filter(month <= 5)
    late = first.filter(pl.col("patron") == first["patron"][0]).head(1)
    for i, batch in enumerate([first, late]):
        batch.write_parquet(tmp_path / f"batch-{i}.parquet")
        done = refresh_job(tmp_path / f"batch-{i}.parquet", tmp_path / "store", spec,
                           RefreshOptions(window=3, threshold=0.3, top_k=5), tmp_path / "index")
    assert done["refresh"]["path"] == "incremental", done["refresh"]
    assert "events" not in read_manifest(tmp_path / "index").counts
    summary = write_report(tmp_path / "index", tmp_path / "r.html", sample=False)
    text = (tmp_path / "r.html").read_text()
    assert summary["forecast"] is False and "whose counts are not a whole run" in text
    assert "reads only the touched entities" in text
