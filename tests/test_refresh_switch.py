"""lshjob refresh chooses its path by the share of entities a batch touches
(lshjob.jobs.refresh.WHOLE_WINDOW_SHARE): a batch touching most of them rebuilds the index
state from the whole window under the kept plan, and the next small batch updates that state.

Oracle: the full run (:func:`lshjob.jobs.run.run_job`) on the window's events, cut from all
events delivered so far with polars in the test, with the kept plan: every column bit for bit.
"""

from __future__ import annotations

from datetime import date

import polars as pl

from lshjob.demo.generate import generate_events
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh
from lshjob.jobs.refresh import RefreshOptions, history, refresh_job
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
OPTIONS = RefreshOptions(window=3, threshold=0.3, top_k=8)


def _full_run(window: pl.DataFrame, plan: dict, folder) -> pl.DataFrame:
    folder.mkdir(parents=True)
    window.write_parquet(folder / "window.parquet")
    run_job(folder / "window.parquet", EventSpec(entity="patron", element="title"),
            RunOptions(threshold=OPTIONS.threshold, top_k=OPTIONS.top_k, perms=plan["perms"], bands=plan["bands"],
                       rows=plan["rows"], seed=plan["seed"], scheme=plan["scheme"]), folder / "index")
    return pl.read_parquet(folder / "index" / "neighbours.parquet")


def test_a_batch_touching_most_entities_rebuilds_and_the_next_small_one_updates(tmp_path, capsys):
    assert 0 < refresh.WHOLE_WINDOW_SHARE < 1
    events, _ = generate_events(150, 5)
    events = events.select("patron", "title", "borrowed_at")
    month = pl.col("borrowed_at").dt.month()
    patrons = events["patron"].unique().sort()
    row = events.filter(month == 4).sort("patron", "title").head(1)  # one patron's late loan of a new title
    held = set(events.filter(pl.col("patron") == row["patron"][0])["title"])
    late = row.with_columns(title=pl.lit(next(t for t in events["title"].unique().sort() if t not in held)))
    batches = [events.filter(month <= 3), events.filter(month == 4), late]
    delivered = pl.DataFrame(schema=batches[0].schema)
    paths = []
    for i, batch in enumerate(batches):
        batch.write_parquet(tmp_path / f"batch-{i}.parquet")
        manifest = refresh_job(tmp_path / f"batch-{i}.parquet", tmp_path / "store", SPEC, OPTIONS, tmp_path / "index")
        delivered = pl.concat([delivered, batch])
        window = delivered.filter(pl.col("borrowed_at").dt.date() >= date(2026, 2, 1)) if i else delivered
        published = pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
        # Oracle: lshjob run on the window's events with the kept plan, every column bit for bit
        assert published.equals(_full_run(window, manifest["plan"], tmp_path / f"oracle-{i}")), f"batch {i}"
        paths.append(manifest["refresh"]["path"])
        if i == 1:
            # Oracle: the share of patrons touched, counted with polars (the next month's borrowers
            # and those of the month that left the window), over the patrons indexed before
            touched = pl.concat([batch["patron"], events.filter(month == 1)["patron"]]).n_unique()
            assert touched / events.filter(month <= 3)["patron"].n_unique() >= refresh.WHOLE_WINDOW_SHARE
            assert "touched" in manifest["refresh"]["why"] and not manifest["refresh"]["rebuilt"]
            assert "rebuilt from the whole window" in capsys.readouterr().err
            # Oracle: Python sets of each patron's titles in the window before and after
            before = {p: set(t) for p, t in batches[0].group_by("patron").agg("title").iter_rows()}
            after = {p: set(t) for p, t in window.group_by("patron").agg("title").iter_rows()}
            assert manifest["refresh"]["changed_entities"] == sum(
                before.get(e) != after.get(e) for e in before.keys() | after.keys())
    assert 1 / len(patrons) < refresh.WHOLE_WINDOW_SHARE
    assert paths == ["whole_window", "whole_window", "incremental"]
    runs = history(tmp_path / "store")["runs"]
    assert "touched" in runs[1]["why"] and runs[2]["why"] == "kept plan"
    plans = [[r["plan"][k] for k in ("perms", "bands", "rows", "seed", "scheme")] for r in runs]
    assert plans[0] == plans[1] == plans[2]  # the switch keeps the plan


def test_the_path_notice_goes_to_stderr_and_not_under_quiet(tmp_path):
    # Oracle: the stderr of the command as typer's runner captures it, with and without --quiet
    from typer.testing import CliRunner

    from lshjob.cli.app import app

    events, _ = generate_events(150, 5)
    events = events.select("patron", "title", "borrowed_at")
    month = pl.col("borrowed_at").dt.month()
    for part, name in ((month <= 3, "first"), (month == 4, "next")):
        events.filter(part).write_parquet(tmp_path / f"{name}.parquet")
    said = []
    for quiet in (False, True):  # two stores fed the same batches; the second batch touches most patrons
        for name in ("first", "next"):
            args = ["refresh", str(tmp_path / f"{name}.parquet"), "--store", str(tmp_path / f"store-{quiet}"),
                    "--entity", "patron", "--element", "title", "--time", "borrowed_at", "--period", "month",
                    "--window", "3", "--threshold", "0.3", "--out", str(tmp_path / f"index-{quiet}")]
            done = CliRunner().invoke(app, args + (["--quiet"] if quiet else []))
            assert done.exit_code == 0, done.output
        said.append(done.stderr)
    assert said[0].startswith("lshjob refresh: ") and "whole window" in said[0], said[0]
    assert said[1] == ""
