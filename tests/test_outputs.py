"""Output paths (lshjob/runtime/outputs.py): one check for sign, merge, run and demo, from the Python
API and from the command line. Oracle: the file system itself (what is at each path before
and after, byte for byte) and, for a symbolic link written through, the file signing to a
plain path gives. No test writes to a device: a named pipe and a socket made in tmp_path
stand for every kind of file that is not a regular one."""

from __future__ import annotations

import os
import socket
from pathlib import Path

import polars as pl
import pytest
from test_cli_errors import SPEC, lshjob, one_error_line

from lshjob.audit.check import audit_index
from lshjob.demo.generate import generate_events, write_demo
from lshjob.errors import InputError, ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.run import RunOptions, run_job
from lshjob.jobs.sign import merge_files, sign_file
from lshjob.runtime.outputs import DEMO_MARKER

EVENTS = EventSpec(entity="patron", element="title")
RUN = RunOptions(threshold=0.5)


def snapshot(folder: Path) -> dict:
    """Every path under ``folder`` with what it is: a file's bytes, a link's target, a kind."""
    found = {}
    for root, dirs, files in os.walk(folder):
        for name in dirs + files:
            path = Path(root) / name
            rel = str(path.relative_to(folder))
            if rel.startswith("state"):
                continue
            if path.is_symlink():
                found[rel] = ("link", os.readlink(path))
            elif path.is_file():
                found[rel] = path.read_bytes()
            else:
                found[rel] = "folder" if path.is_dir() else "other"
    return found


@pytest.fixture
def place(tmp_path, small_events):
    """tmp_path with the events (loans.parquet), a copy in exp/, an empty folder, a regular
    file, a named pipe and a user's folder holding its own events.parquet."""
    (tmp_path / "exp").mkdir()
    (tmp_path / "exp" / "a.parquet").write_bytes(small_events.read_bytes())
    (tmp_path / "emptydir").mkdir()
    (tmp_path / "afile").write_text("notes\n")
    os.mkfifo(tmp_path / "fifo")
    (tmp_path / "mydata").mkdir()
    (tmp_path / "mydata" / "events.parquet").write_bytes(small_events.read_bytes())
    return tmp_path


# Python API ------------------------------------------------------------------------------


@pytest.mark.parametrize("out, message", [("", "--out is empty"), ("  ", "only whitespace")])
def test_an_empty_output_is_refused_by_every_writer(place, small_events, monkeypatch, out, message):
    monkeypatch.chdir(place)
    before = snapshot(place)
    sigs = place / "sigs.parquet"
    for write in (lambda: sign_file(small_events, out, EVENTS),
                  lambda: run_job(small_events, EVENTS, RUN, out),
                  lambda: merge_files([place / "exp" / "a.parquet"], out),
                  lambda: write_demo(out, patrons=100)):
        with pytest.raises(ParameterError, match=message):
            write()
    assert snapshot(place) == before and not sigs.exists()


def test_run_refuses_an_output_a_later_run_would_read_as_input(place):
    before = snapshot(place)
    exp = place / "exp"
    cases = [
        (exp, exp / "index", "is in the input folder"),
        (str(exp / "*.parquet"), exp / "x.parquet", "matches the input pattern"),
        (str(exp / "*.parquet"), exp, "would publish neighbours.parquet, which the input pattern"),
        (exp, exp, "is one of the inputs"),
    ]
    for source, out, message in cases:
        with pytest.raises(ParameterError, match=message):
            run_job(source, EVENTS, RUN, out)
    assert snapshot(place) == before


def test_what_is_at_the_output_path_must_be_what_the_command_writes(place, small_events, monkeypatch):
    monkeypatch.chdir(place)  # a socket's path must be short: made relative to here
    server = socket.socket(socket.AF_UNIX)
    server.bind("sock")
    try:
        before = snapshot(place)
        cases = [
            (lambda: sign_file(small_events, "fifo", EVENTS), "--out fifo is a named pipe \\(FIFO\\); sign writes"),
            (lambda: sign_file(small_events, "sock", EVENTS), "--out sock is a socket; sign writes a regular file"),
            (lambda: sign_file(small_events, "emptydir", EVENTS), "--out emptydir is a folder; sign writes one file"),
            (lambda: sign_file(small_events, "afile/s.parquet", EVENTS), "afile is a file, not a folder"),
            (lambda: merge_files(["exp/a.parquet"], "fifo"), "--out fifo is a named pipe"),
            (lambda: run_job(small_events, EVENTS, RUN, "afile"), "--out afile is a file; run writes an index folder"),
            (lambda: run_job(small_events, EVENTS, RUN, "fifo"), "--out fifo is a named pipe \\(FIFO\\); run writes"),
            (lambda: run_job(small_events, EVENTS, RUN, "afile/index"), "afile is a file, not a folder"),
            (lambda: run_job(small_events, EVENTS, RunOptions(threshold=0.5, scratch="afile"), "idx"),
             "--scratch afile is not a folder \\(it is a file\\)"),
            (lambda: run_job(small_events, EVENTS, RunOptions(threshold=0.5, scratch="nowhere"), "idx"),
             "--scratch nowhere does not exist"),
            (lambda: write_demo("afile", patrons=100), "--out afile is a file; demo writes a folder"),
        ]
        for write, message in cases:
            with pytest.raises(ParameterError, match=message):
                write()
        assert snapshot(place) == before
    finally:
        server.close()


def test_a_symbolic_link_output_is_written_through_and_kept(place, small_events):
    target = place / "target.parquet"
    target.write_text("old\n")
    link = place / "link.parquet"
    link.symlink_to("target.parquet")
    summary = sign_file(small_events, link, EVENTS)
    plain = place / "plain.parquet"
    sign_file(small_events, plain, EVENTS)
    assert link.is_symlink() and os.readlink(link) == "target.parquet"
    assert target.read_bytes() == plain.read_bytes()  # same input and seed: byte-identical
    assert summary["out"] == str(target)
    assert not [p for p in os.listdir(place) if ".tmp" in p]
    (place / "gone.parquet").symlink_to("exp/a.parquet")  # a link to the input is the input
    with pytest.raises(ParameterError, match="is one of the inputs"):
        sign_file(place / "exp" / "a.parquet", place / "gone.parquet", EVENTS)


def test_demo_writes_only_into_a_new_empty_or_earlier_demo_folder(place):
    user = place / "mydata" / "events.parquet"
    before = user.read_bytes()
    with pytest.raises(ParameterError, match="--out .*mydata is a folder with other files in it"):
        write_demo(place / "mydata", patrons=100)
    assert user.read_bytes() == before and os.listdir(place / "mydata") == ["events.parquet"]
    first = write_demo(place / "emptydir", patrons=100, seed=1)
    assert (place / "emptydir" / DEMO_MARKER).is_file()
    again = write_demo(place / "emptydir", patrons=100, seed=2)  # an earlier demo's folder: rewritten
    assert pl.read_parquet(again["events"]).equals(generate_events(100, seed=2)[0])
    assert not pl.read_parquet(first["events"]).equals(generate_events(100, seed=1)[0])  # replaced


def test_merge_expands_patterns_in_sorted_order(tmp_path, small_events):
    # Oracle: merge of the files named one by one, in sorted order.
    for name in ("m_2.parquet", "m_1.parquet"):
        sign_file(small_events, tmp_path / name, EVENTS)
    by_names = merge_files([tmp_path / "m_1.parquet", tmp_path / "m_2.parquet"], tmp_path / "named.parquet")
    by_pattern = merge_files([str(tmp_path / "m_*.parquet")], tmp_path / "globbed.parquet")
    assert by_pattern["inputs"] == by_names["inputs"] and by_pattern["rows_in"] == 2 * 3
    assert pl.read_parquet(tmp_path / "globbed.parquet").equals(pl.read_parquet(tmp_path / "named.parquet"))
    with pytest.raises(InputError, match="n_\\*.parquet: the pattern matches no signature files"):
        merge_files([str(tmp_path / "n_*.parquet")], tmp_path / "none.parquet")
    with pytest.raises(ParameterError, match="matches the input pattern"):
        merge_files([str(tmp_path / "m_*.parquet")], tmp_path / "m_3.parquet")
    assert not (tmp_path / "none.parquet").exists() and not (tmp_path / "m_3.parquet").exists()


# Command line ----------------------------------------------------------------------------

RUN_ARGS = [*SPEC, "--threshold", "0.5"]


@pytest.mark.parametrize("args, expected", [
    (["run", "loans.parquet", *RUN_ARGS, "--out", ""], "error: --out is empty; give a path"),
    (["sign", "loans.parquet", *SPEC, "--out", "   "], "error: --out '   ' is only whitespace; give a path"),
    (["run", "exp", *RUN_ARGS, "--out", "exp/index"],
     "error: --out exp/index is in the input folder exp; choose another path"),
    (["run", "exp/*.parquet", *RUN_ARGS, "--out", "exp/x.parquet"],
     "error: --out exp/x.parquet matches the input pattern exp/*.parquet; choose another path"),
    (["sign", "loans.parquet", *SPEC, "--out", "fifo"],
     "error: --out fifo is a named pipe (FIFO); sign writes a regular file"),
    (["sign", "loans.parquet", *SPEC, "--out", "emptydir"], "error: --out emptydir is a folder; sign writes one file"),
    (["run", "loans.parquet", *RUN_ARGS, "--out", "afile"], "error: --out afile is a file; run writes an index folder"),
    (["sign", "loans.parquet", *SPEC, "--out", "afile/s.parquet"],
     "error: --out afile/s.parquet: afile is a file, not a folder"),
    (["run", "loans.parquet", *RUN_ARGS, "--out", "idx", "--scratch", "afile"],
     "error: --scratch afile is not a folder (it is a file)"),
    (["run", "loans.parquet", *RUN_ARGS, "--out", "idx", "--scratch", "nowhere"],
     "error: --scratch nowhere does not exist; make the folder first"),
    (["demo", "--patrons", "100", "--out", "mydata"], "error: --out mydata is a folder with other files in it"),
    (["merge", "m_*.parquet", "--out", "x.parquet"], "error: m_*.parquet: the pattern matches no signature files"),
    (["plan", "--threshold", "0.5", "--perms", "128", "--chart", "fifo"],
     "error: --chart fifo is a named pipe (FIFO); plan --chart writes a regular file"),
])
def test_a_bad_output_path_is_one_line_exit_2_and_nothing_written(place, args, expected):
    before = snapshot(place)
    done = lshjob(*args, cwd=place)
    assert done.returncode == 2, done.stderr
    assert one_error_line(done).startswith(expected)
    assert snapshot(place) == before  # the inputs untouched, nothing made


def test_audit_of_an_index_whose_input_is_gone_names_it_and_points_to_events(tmp_path, small_events):
    run_job(small_events, EVENTS, RUN, tmp_path / "idx")
    moved = small_events.with_name("moved.parquet")
    small_events.rename(moved)
    with pytest.raises(InputError, match="loans.parquet: no such file or directory .*; pass --events to audit "
                                         "against other events$"):
        audit_index(tmp_path / "idx")
    done = lshjob("audit", "idx", cwd=tmp_path)
    assert done.returncode == 2 and one_error_line(done).endswith("; pass --events to audit against other events")
    report = audit_index(tmp_path / "idx", events=moved, sample=3)  # the way out the message gives
    assert report["audited"] and report["wrong_pairs"] == 0
