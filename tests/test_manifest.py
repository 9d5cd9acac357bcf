"""The run's manifest: the record returned is the record written, with provenance (run id,
times, host, command, input files with their digests, warnings); the neighbours file carries
its own record; an audit finds the inputs from another working directory."""

from __future__ import annotations

import hashlib
import json
import os
import re
import socket
from datetime import UTC, datetime, timedelta

import polars as pl
from helpers import planted_pairs

from lshjob import EventSpec
from lshjob.audit.check import audit_index
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")


def _two_files(folder):
    events = planted_pairs(150, 0.5, seed=7, background=200)
    folder.mkdir()
    events.slice(0, 2000).write_parquet(folder / "a.parquet")
    events.slice(2000).write_parquet(folder / "b.parquet")
    return events


def test_the_manifest_written_is_the_manifest_returned_with_provenance(tmp_path):
    _two_files(tmp_path / "loans")
    before = datetime.now(UTC)
    m = run_job(tmp_path / "loans", SPEC, RunOptions(threshold=0.5), tmp_path / "idx")
    after = datetime.now(UTC)
    assert json.loads((tmp_path / "idx/manifest.json").read_text()) == m
    assert m["seconds"]["total"] > 0 and m["out"] == str((tmp_path / "idx").absolute())
    assert re.fullmatch(r"\d{8}T\d{6}Z-[0-9a-f]{6}", m["run_id"])
    started = datetime.fromisoformat(m["started_at"].replace("Z", "+00:00"))
    finished = datetime.fromisoformat(m["finished_at"].replace("Z", "+00:00"))
    assert before <= started <= finished <= after and m["started_at"].endswith("Z")
    assert finished - started >= timedelta(seconds=m["seconds"]["total"]) - timedelta(milliseconds=50)
    assert m["host"] == socket.gethostname() and m["command"] is None
    assert isinstance(m["warnings"], list) and m["inputs"]["time_range"] is None
    # Each file: absolute path, size, modification time and sha256 (hashlib and os.stat as reference).
    files = m["inputs"]["files"]
    assert [f["path"] for f in files] == [str(tmp_path / "loans" / name) for name in ("a.parquet", "b.parquet")]
    overall = hashlib.sha256()  # lshjob.core.digest: the sha256 of the files' sha256 (hex), one a line
    for record in files:
        data = open(record["path"], "rb").read()
        assert record["sha256"] == hashlib.sha256(data).hexdigest() and record["bytes"] == len(data)
        mtime = datetime.fromtimestamp(os.stat(record["path"]).st_mtime, UTC)
        assert datetime.fromisoformat(record["mtime"].replace("Z", "+00:00")) == mtime
        overall.update(hashlib.sha256(data).hexdigest().encode() + b"\n")
    assert m["inputs"]["sha256"] == overall.hexdigest()
    assert m["inputs"]["source"] == str(tmp_path / "loans")
    # The neighbours file's own record (read by polars from the Parquet footer).
    meta = json.loads(pl.read_parquet_metadata(tmp_path / "idx/neighbours.parquet")["lshjob"])
    assert meta["run_id"] == m["run_id"] and meta["threshold"] == 0.5 and meta["top_k"] == 50
    assert meta["entity_column"] == "patron" and meta["element_column"] == "title"
    assert meta["format"] == "lshjob-neighbours" and meta["format_version"] == 1
    again = run_job(tmp_path / "loans", SPEC, RunOptions(threshold=0.5), tmp_path / "idx")
    assert again["run_id"] != m["run_id"]


def test_an_audit_from_another_directory_finds_inputs_given_relative(tmp_path, monkeypatch):
    # Oracle: the audit's brute force over the inputs it reads; a wrong path would raise.
    _two_files(tmp_path / "loans")
    monkeypatch.chdir(tmp_path)
    m = run_job("loans", SPEC, RunOptions(threshold=0.5, top_k=100), "idx")
    assert m["inputs"]["given"] == "loans" and m["inputs"]["source"] == str(tmp_path / "loans")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    report = audit_index(tmp_path / "idx", sample=100)
    assert report["events"] == str(tmp_path / "loans")
    assert report["wrong_pairs"] == 0 and report["true_pairs"] > 0
