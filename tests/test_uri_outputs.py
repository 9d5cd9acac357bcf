"""An index published to a folder named by a URI, as a run on Spark publishes it: the driver
streams the sorted parts Spark wrote into neighbours.parquet through Arrow's file systems and
writes the manifest last; the writer's marker; audit reading the index from the URI.

The S3 tests run against moto's S3 server (a test-only dependency) through
pyarrow.fs.S3FileSystem, as a driver reaches S3; they skip, saying why, without moto. Spark
itself is not needed: the parts are written here as Spark writes them (part-NNNNN files in
partition order, rank as Int32, a _SUCCESS marker). The whole run on Spark into a file://
URI is tests/test_spark_run.py.
"""

from __future__ import annotations

import hashlib
import json
import os
import socket

import polars as pl
import pytest
from typer.testing import CliRunner

pa = pytest.importorskip("pyarrow", reason="URIs are reached through pyarrow (lshjob[spark])")
import pyarrow.parquet as pq  # noqa: E402

from lshjob.cli.app import app  # noqa: E402
from lshjob.errors import Busy, InputError, ParameterError  # noqa: E402
from lshjob.jobs.run_spark_out import UriFolder  # noqa: E402
from lshjob.runtime.remote import MARKER, Location, MarkerLock  # noqa: E402

BUCKET = "lshjob-test"


@pytest.fixture(scope="module")
def s3():
    """An S3 endpoint (moto's server on a free port) and its bucket; AWS_ENDPOINT_URL points
    Arrow's S3 file system at it."""
    server_module = pytest.importorskip("moto.server", reason="moto[server] is not installed (pip install "
                                        "'moto[server]'): the S3 tests need a local S3 endpoint")
    from pyarrow import fs

    server = server_module.ThreadedMotoServer(port=0, verbose=False)
    server.start()
    _, port = server.get_host_and_port()
    saved = {k: os.environ.get(k) for k in ("AWS_ENDPOINT_URL", "AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY",
                                             "AWS_DEFAULT_REGION")}
    os.environ.update(AWS_ENDPOINT_URL=f"http://127.0.0.1:{port}", AWS_ACCESS_KEY_ID="test",
                      AWS_SECRET_ACCESS_KEY="test", AWS_DEFAULT_REGION="us-east-1")
    fs.S3FileSystem(endpoint_override=f"http://127.0.0.1:{port}", allow_bucket_creation=True,
                    region="us-east-1").create_dir(BUCKET)
    yield f"s3://{BUCKET}"
    for key, value in saved.items():
        if value is None:
            os.environ.pop(key, None)
        else:
            os.environ[key] = value
    server.stop()


def _blocks(seed: int) -> list[pl.DataFrame]:
    """Three parts of ranked rows as Spark writes them (rank Int32), in the sort's order."""
    rows = []
    for e in range(30):
        for r in range(1, 4):
            rows.append((f"patron-{e:03d}", f"patron-{(e + r * seed) % 30:03d}", 1.0 / (r + seed), 0.5, 3, r))
    table = pl.DataFrame(rows, schema={"entity": pl.String, "neighbour": pl.String, "jaccard": pl.Float64,
                                       "estimate": pl.Float64, "bands_shared": pl.Int32, "rank": pl.Int32},
                         orient="row")
    return [table[:40], table[40:40], table[40:]]  # an empty part, as a partition without rows gives


def _publish(folder: UriFolder, blocks: list[pl.DataFrame], run: str) -> dict:
    warnings: list[str] = []
    notes = folder.acquire()
    try:
        folder.make_work()
        folder.work.fs.create_dir(folder.work.path("neighbours"), recursive=True)
        for i, block in enumerate(blocks):
            pq.write_table(block.to_arrow(), folder.work.path("neighbours", f"part-{i:05d}-x.snappy.parquet"),
                           filesystem=folder.work.fs)
        folder.work.write(b"", "neighbours", "_SUCCESS")
        written = folder.stage(pl.String, {"run_id": run}, warnings)
        manifest = {"run_id": run, "output": written}
        folder.commit(manifest)
    finally:
        folder.close()
    return {"notes": notes, "warnings": warnings, **manifest}


def _check_published(loc: Location, blocks: list[pl.DataFrame], published: dict) -> bytes:
    # Oracle: the parts' rows concatenated in name order (polars), rank as UInt32; the file's
    # sha256 by hashlib over the bytes read back; the key-value record as written.
    data = loc.read("neighbours.parquet")
    expected = pl.concat(blocks).with_columns(pl.col("rank").cast(pl.UInt32))
    got = pl.read_parquet(data)
    assert got.equals(expected) and got.schema["rank"] == pl.UInt32
    assert published["output"] == {"neighbours": "neighbours.parquet", "rows": expected.height,
                                   "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}
    assert json.loads(loc.read("manifest.json")) == {k: published[k] for k in ("run_id", "output")}
    kv = pq.read_metadata(pa.BufferReader(data)).metadata
    assert json.loads(kv[b"lshjob"]) == {"run_id": published["run_id"]}
    assert [n for n in loc.names() if n.startswith(".")] == []  # no work, staging or marker left
    return data


@pytest.mark.parametrize("where", ["s3", "file"])
def test_an_index_published_to_a_uri_is_the_parts_rows_and_keeps_the_previous(where, request, tmp_path):
    # Oracle: _check_published; and the first index's bytes and manifest in previous/ after the
    # second publish (hashlib). s3: an object store (streamed to its own name, previous/ by
    # copies); file: a file system with renames (staging folder, renames).
    base = request.getfixturevalue("s3") if where == "s3" else tmp_path.absolute().as_uri()
    out = f"{base}/indexes/loans"
    loc = Location.open(out)
    first = _publish(UriFolder(out, f"{base}/events/loans.parquet", None, 0), _blocks(1), "first")
    first_bytes = _check_published(loc, _blocks(1), first)
    loc.fs.create_dir(loc.path(".work-999999"), recursive=True)  # a dead run's work folder
    loc.write(b"x", ".work-999999", "part-00000.parquet")
    second = _publish(UriFolder(out, f"{base}/events/loans.parquet", None, 0), _blocks(2), "second")
    _check_published(loc, _blocks(2), second)
    assert any(".work-999999" in n for n in second["notes"]) and second["warnings"] == []
    assert loc.read("previous", "neighbours.parquet") == first_bytes
    assert json.loads(loc.read("previous", "manifest.json"))["run_id"] == "first"


def test_a_marker_of_another_run_keeps_a_writer_out_and_a_dead_ones_is_taken_over(s3):
    # Oracle: the documented behaviour (lshjob.runtime.remote): a marker naming a run on
    # another host is Busy (exit 75) with the way out; one naming a process of this host that
    # no longer exists is taken over with a note; the writer's own marker goes when it lets go.
    loc = Location.open(f"{s3}/indexes/locked")
    other = {"pid": 1, "host": "catalogue-node-7", "started": "2026-12-01T02:00:00Z", "command": "lshjob run",
             "what": "index", "token": "0"}
    loc.write(json.dumps(other).encode(), MARKER)
    with pytest.raises(Busy) as busy:
        MarkerLock(loc).acquire()
    assert "pid 1 on host catalogue-node-7" in str(busy.value) and f"remove {loc.uri}/{MARKER}" in str(busy.value)
    assert json.loads(loc.read(MARKER))["host"] == "catalogue-node-7"  # left as it was
    dead = os.getpid() + 1
    while True:  # a pid of this host with no process
        try:
            os.kill(dead, 0)
            dead += 1
        except ProcessLookupError:
            break
        except PermissionError:
            dead += 1
    loc.write(json.dumps(dict(other, pid=dead, host=socket.gethostname())).encode(), MARKER)
    lock = MarkerLock(loc).acquire()
    assert "took over the marker" in lock.notes[0] and json.loads(loc.read(MARKER))["pid"] == os.getpid()
    lock.release()
    assert loc.kind(MARKER) is None


def test_uri_outputs_are_refused_with_one_line(s3):
    # Oracle: the documented refusals (one line, exit 2 through the CLI's error handler).
    loc = Location.open(f"{s3}/afile")
    loc.write(b"not a folder")
    with pytest.raises(ParameterError, match=r"^--out s3://lshjob-test/afile is a file; run writes an index folder$"):
        UriFolder(f"{s3}/afile", f"{s3}/events", None, 0)
    with pytest.raises(ParameterError, match="overlaps the input"):
        UriFolder(f"{s3}/events/index", f"{s3}/events", None, 0)
    with pytest.raises(InputError, match=r"^--out nosuch://x/y: this file system cannot be opened from here"):
        UriFolder("nosuch://x/y", f"{s3}/events", None, 0)


def test_audit_reads_an_index_from_s3_as_from_its_folder(s3, tmp_path):
    # Oracle: the audit of the same index in a local folder (itself checked against brute
    # force in tests/test_audit.py): the same figures; the report names the URI. report and
    # diff refuse a URI with one line (exit 2).
    from lshjob.demo.generate import generate_events

    events, _ = generate_events(150, seed=3)
    events.select("patron", "title").write_parquet(tmp_path / "loans.parquet")
    runner = CliRunner()
    done = runner.invoke(app, ["run", str(tmp_path / "loans.parquet"), "--entity", "patron", "--element", "title",
                               "--threshold", "0.3", "--top-k", "5", "--out", str(tmp_path / "index"), "--quiet"])
    assert done.exit_code == 0, done.stderr
    loc = Location.open(f"{s3}/indexes/audited")
    for name in ("manifest.json", "neighbours.parquet"):
        loc.write((tmp_path / "index" / name).read_bytes(), name)
    reports = []
    for index in (str(tmp_path / "index"), loc.uri):
        done = runner.invoke(app, ["audit", index, "--sample", "60", "--json"])
        assert done.exit_code == 0, done.stderr
        reports.append(json.loads(done.stdout))
    assert reports[1].pop("index") == loc.uri
    reports[0].pop("index")
    for report in reports:
        report.pop("peak_memory_bytes")
    assert reports[0] == reports[1] and reports[0]["true_pairs"] > 0
    for command in (["report", loc.uri], ["diff", loc.uri, str(tmp_path / "index")]):
        done = runner.invoke(app, command)
        assert done.exit_code == 2 and len(done.stderr.strip().splitlines()) == 1, done.stderr
        assert "reads an index folder of this machine" in done.stderr
    loc.remove("manifest.json")  # as while an object store is being published to
    done = runner.invoke(app, ["audit", loc.uri])
    assert done.exit_code == 2 and "no manifest.json" in done.stderr, done.stderr


def test_the_local_engine_refuses_an_out_uri_and_reads_a_file_uri_as_its_path(tmp_path, monkeypatch):
    # Oracle: the documented refusal (one line, exit 2, nothing made: no folder named "s3a:");
    # and a file:// --out is the folder it names (Python's pathlib as_uri).
    from lshjob.demo.generate import generate_events

    generate_events(100, seed=1)[0].select("patron", "title").write_parquet(tmp_path / "loans.parquet")
    base = ["run", str(tmp_path / "loans.parquet"), "--entity", "patron", "--element", "title", "--threshold", "0.3",
            "--quiet"]
    monkeypatch.chdir(tmp_path)
    done = CliRunner().invoke(app, [*base, "--out", "s3a://library-indexes/loans"])
    assert done.exit_code == 2 and len(done.stderr.strip().splitlines()) == 1, done.stderr
    assert "written by --engine spark" in done.stderr and not (tmp_path / "s3a:").exists()
    done = CliRunner().invoke(app, ["sign", str(tmp_path / "loans.parquet"), "--entity", "patron", "--element",
                                    "title", "--out", "s3a://library-indexes/signatures.parquet"])
    assert done.exit_code == 2 and "a URI; this writes to a path of this machine" in done.stderr, done.stderr
    assert not (tmp_path / "s3a:").exists()
    done = CliRunner().invoke(app, [*base, "--out", (tmp_path / "index").as_uri()])
    assert done.exit_code == 0, done.stderr
    assert (tmp_path / "index" / "manifest.json").is_file() and not (tmp_path / "file:").exists()
