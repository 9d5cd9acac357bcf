"""A run on Spark from its events: Spark reads them, groups them by entity and signs them on
the executors; the signatures, and the neighbours published, are the local engine's bit
for bit. Every test skips, saying why, without pyspark or Java (the ``spark_session`` fixture).
"""

from __future__ import annotations

import json
import unicodedata

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import crowd_caps
from lshjob.jobs.sign import sign_file
from lshjob.sign.params import SignatureParams


def _mixed_events() -> pl.DataFrame:
    """Integer entities (a few null), text elements in two Unicode forms (NFC and NFD of the
    same titles), counts; groups of identical sets larger than top_k + 1."""
    rng = np.random.default_rng(5)
    titles = [f"t{i}" for i in range(40)] + [unicodedata.normalize("NFD", "Café Noël"), "Café Noël", "Über"]
    rows = []
    for patron in range(300):
        if patron < 12:  # one group of 12 identical sets
            chosen = ["t1", "t2", "t3", "Café Noël"]
        elif patron < 20:  # another of 8, the NFD form of the same title
            chosen = ["t4", "t5", unicodedata.normalize("NFD", "Café Noël")]
        else:
            base = (patron // 10) % 8
            chosen = [f"t{(base * 5 + j) % 40}" for j in range(6)] + [str(rng.choice(titles)) for _ in range(3)]
        rows += [(patron, t, int(rng.integers(1, 3))) for t in chosen]
    rows += [(None, "t1", 1), (7, None, 1)]
    patrons, titles_, loans = zip(*rows)
    return pl.DataFrame({"patron": list(patrons), "title": list(titles_), "loans": list(loans)},
                        schema={"patron": pl.Int64, "title": pl.String, "loans": pl.Int64})


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    path = tmp_path_factory.mktemp("spark-mixed") / "loans.parquet"
    _mixed_events().write_parquet(path)
    return path


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_signatures_signed_on_the_executors_are_the_local_signatures(scheme, mixed, spark_session, tmp_path):
    # Oracle: lshjob sign (the local engine; its own oracle is the documented definition,
    # tests/test_signatures.py) of the same events: the same entities, signatures bit for bit
    # and set sizes.
    from lshjob.index.spark.events import element_sets, read_events, signature_frame

    spec = EventSpec(entity="patron", element="title", count="loans", min_count=2, on_null="drop")
    params = SignatureParams(scheme=scheme, perms=64, seed=9)
    sign_file(mixed, tmp_path / "local.parquet", spec, params)
    expected = pl.read_parquet(tmp_path / "local.parquet")
    frame, facts = read_events(spark_session, mixed.absolute().as_uri(), spec)
    got = pl.from_arrow(signature_frame(element_sets(frame, spec, facts), params).orderBy("entity").toArrow())
    assert facts.null_rows_dropped == 2 and facts.entities == expected.height > 250
    assert got["entity"].to_list() == expected["entity"].to_list()
    assert got["set_size"].cast(pl.UInt32).to_list() == expected["set_size"].to_list()
    as_u64 = got["signature"].cast(pl.List(pl.Int64)).list.eval(pl.element().reinterpret(signed=False))
    assert as_u64.to_list() == expected["signature"].to_list()


def _run(*args) -> tuple[int, str, str]:
    done = CliRunner().invoke(app, ["run", *map(str, args)])
    return done.exit_code, done.stdout, done.stderr


def test_a_run_on_spark_from_file_uris_publishes_the_local_rows(mixed, spark_session, tmp_path, monkeypatch):
    # Oracle: the local engine's neighbours.parquet of the same options (rows equal, floats bit
    # for bit): integer keys, counts under --min-count, nulls dropped, groups of identical sets
    # longer than top_k + 1, oversize buckets split (--max-bucket 6), and a plan drawn from a
    # sample of entities (--sample-size 100 of 280) with the banding given. The run on Spark holds
    # no bucket in reserve (lshjob.index.verify._reserve), so neither does the local run here.
    monkeypatch.setattr(crowd_caps, "RESERVE_MEMBERS", 0)
    options = ["--entity", "patron", "--element", "title", "--count", "loans", "--min-count", "2",
               "--on-null", "drop", "--threshold", "0.3", "--top-k", "3", "--max-bucket", "6",
               "--perms", "64", "--bands", "16", "--rows", "4", "--sample-size", "100"]
    code, _, err = _run(mixed, *options, "--out", tmp_path / "local", "--quiet")
    assert code == 0, err
    code, _, err = _run(mixed.absolute().as_uri(), *options, "--out", (tmp_path / "spark").absolute().as_uri(),
                        "--engine", "spark", "--quiet")
    assert code == 0, err
    expected = pl.read_parquet(tmp_path / "local" / "neighbours.parquet")
    got = pl.read_parquet(tmp_path / "spark" / "neighbours.parquet")
    assert expected.height > 300 and (expected["jaccard"] == 1.0).sum() >= 12 * 3
    assert got.equals(expected)
    assert [p.name for p in (tmp_path / "spark").iterdir() if p.name.startswith(".")] == []  # work, staging gone
    # Oracle: the audit of the local engine's index (brute force, tests/test_audit.py): the
    # same figures from the index read by its file:// URI.
    audits = [CliRunner().invoke(app, ["audit", str(index), "--sample", "40", "--json"])
              for index in (tmp_path / "local", (tmp_path / "spark").absolute().as_uri())]
    assert all(a.exit_code == 0 for a in audits), audits[1].stderr
    figures = [{k: json.loads(a.stdout)[k] for k in ("recall", "true_pairs", "wrong_pairs", "failed")} for a in audits]
    assert figures[0] == figures[1] and figures[0]["true_pairs"] > 0
    # Oracle for the input's digest (hashed on the executors): hashlib over the file's bytes,
    # chained as lshjob.core.digest documents (the sha256 of the files' hex digests, a line
    # each), and the local run's manifest, which lshjob audit compares its events with.
    import hashlib

    file_sha = hashlib.sha256(mixed.read_bytes()).hexdigest()
    inputs = json.loads((tmp_path / "spark" / "manifest.json").read_text())["inputs"]
    local_inputs = json.loads((tmp_path / "local" / "manifest.json").read_text())["inputs"]
    assert inputs["files"][0]["sha256"] == file_sha
    assert inputs["files"][0]["bytes"] == mixed.stat().st_size
    assert inputs["sha256"] == hashlib.sha256(f"{file_sha}\n".encode()).hexdigest() == local_inputs["sha256"]


def test_a_run_on_spark_refuses_bad_input_with_one_line(mixed, spark_session, tmp_path):
    # Oracle: the documented messages and exit code 2 (bad input), nothing written.
    given = ["--element", "title", "--threshold", "0.5", "--engine", "spark"]
    code, _, err = _run(mixed, "--entity", "reader", *given, "--out", tmp_path / "a")
    assert code == 2 and err.strip().endswith("column 'reader' (from --entity) not found; "
                                              "columns are: patron, title, loans"), err
    code, _, err = _run(mixed, "--entity", "patron", *given, "--out", tmp_path / "b")
    assert code == 2 and "column 'patron' has 1 null value(s)" in err and len(err.strip().splitlines()) == 1, err
    assert not (tmp_path / "a" / "neighbours.parquet").exists() and not (tmp_path / "b" / "neighbours.parquet").exists()


def test_refresh_on_spark_publishes_the_local_refreshes_rows(spark_session, tmp_path):
    # Oracle: lshjob refresh with the local engine, batch after batch into its own store: the
    # same neighbours.parquet rows after each refresh (the first plans, the second keeps the plan).
    from lshjob.demo.generate import generate_events

    events, _ = generate_events(150, seed=3)
    month = pl.col("borrowed_at").dt.month()
    batches = [events.filter(month <= 4), events.filter(month > 4)]
    base = ["--entity", "patron", "--element", "title", "--time", "borrowed_at", "--period", "month",
            "--window", "3", "--threshold", "0.3", "--top-k", "5", "--quiet"]
    for i, batch in enumerate(batches):
        path = tmp_path / f"batch-{i}.parquet"
        batch.select("patron", "title", "borrowed_at").write_parquet(path)
        for engine in ("local", "spark"):
            done = CliRunner().invoke(app, ["refresh", str(path), *base, "--store", str(tmp_path / f"store-{engine}"),
                                            "--out", str(tmp_path / f"index-{engine}"), "--engine", engine])
            assert done.exit_code == 0, done.stderr
        expected = pl.read_parquet(tmp_path / "index-local" / "neighbours.parquet")
        got = pl.read_parquet(tmp_path / "index-spark" / "neighbours.parquet")
        assert expected.height > 50
        assert got.equals(expected), i
    manifest = json.loads((tmp_path / "index-spark" / "manifest.json").read_text())
    assert manifest["refresh"]["path"] == "full_run" and manifest["engines"]["join"] == "spark"


def test_identical_sets_only_on_spark_publish_the_local_rows(mixed, spark_session, tmp_path):
    # Oracle: the local engine's rows for --threshold 1 (no bands: the groups of identical sets
    # are the index), and brute force: every published pair's sets are equal (Python sets).
    options = ["--entity", "patron", "--element", "title", "--on-null", "drop", "--threshold", "1", "--top-k", "4"]
    code, _, err = _run(mixed, *options, "--out", tmp_path / "local", "--quiet")
    assert code == 0, err
    code, _, err = _run(mixed, *options, "--out", tmp_path / "spark", "--engine", "spark", "--quiet")
    assert code == 0, err
    expected = pl.read_parquet(tmp_path / "local" / "neighbours.parquet")
    got = pl.read_parquet(tmp_path / "spark" / "neighbours.parquet")
    assert got.equals(expected) and expected.height >= 12 * 4 + 8 * 4
    events = _mixed_events().drop_nulls()
    sets = {p: {unicodedata.normalize("NFC", t) for t in g["title"]} for (p,), g in events.group_by("patron")}
    assert all(sets[a] == sets[b] for a, b in got.select("entity", "neighbour").iter_rows())


def test_text_entity_keys_in_two_unicode_forms_are_one_entity_on_spark(spark_session, tmp_path, monkeypatch):
    # Oracle: the local engine's rows (its ingest puts text keys in NFC) for text entity keys
    # given in NFC and NFD forms of one name, beside ASCII ones: the same entities, the same
    # neighbours; and Python's unicodedata: the published keys are all NFC. The elements'
    # hashes are joined to the events by a shuffle here (the other tests: a broadcast).
    from lshjob.index.spark import events

    monkeypatch.setattr(events, "BROADCAST_BYTES", 0)
    titles = [f"t{i}" for i in range(12)]
    rows = []
    for n, patron in enumerate(["Zoë Brontë", "Ana", "Noël", "Bob", "Chloé", "Dan"] * 2):
        given = unicodedata.normalize("NFD" if n >= 6 else "NFC", patron)
        rows += [(given, titles[(n % 6 + j) % 12]) for j in range(4 + n // 6)]
    path = tmp_path / "loans.parquet"
    pl.DataFrame(rows, schema={"patron": pl.String, "title": pl.String}, orient="row").write_parquet(path)
    options = ["--entity", "patron", "--element", "title", "--threshold", "0.2", "--top-k", "3", "--quiet"]
    code, _, err = _run(path, *options, "--out", tmp_path / "local")
    assert code == 0, err
    code, _, err = _run(path, *options, "--out", tmp_path / "spark", "--engine", "spark")
    assert code == 0, err
    expected = pl.read_parquet(tmp_path / "local" / "neighbours.parquet")
    got = pl.read_parquet(tmp_path / "spark" / "neighbours.parquet")
    assert got.equals(expected) and expected["entity"].n_unique() == 6
    assert all(unicodedata.is_normalized("NFC", k) for k in got["entity"].to_list())
