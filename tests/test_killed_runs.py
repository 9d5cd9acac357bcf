"""Runs killed with SIGKILL at join, verify and publish: the last good index stays byte for
byte, and the next run removes what the dead run left.

Each killed run is a real ``lshjob run`` process that sends itself SIGKILL when it reaches
the stage: the script below replaces the stage's function in that child process only.
Oracles: sha256 (hashlib) of the published files before and after, the folder listings,
and the disk blocks the leftovers held (os.stat), summed here.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from helpers import index_digest, planted_events_file

from lshjob import EventSpec
from lshjob.jobs.run import RunOptions, run_job
from lshjob.runtime.folder_lock import LOCK_NAME

SPEC = EventSpec(entity="patron", element="title")
INDEX = ("neighbours.parquet", "manifest.json")

KILL_AT = r"""
import os, signal, sys
import lshjob.index.join.duckdb, lshjob.index.verify.local

def die(*args, **kwargs):
    os.kill(os.getpid(), signal.SIGKILL)

stage = sys.argv[1]
if stage == "join":
    lshjob.index.join.duckdb.candidate_pairs = die
elif stage == "verify":
    lshjob.index.verify.local.verify_blocks = die
elif stage == "publish":  # as the new neighbours file is renamed into place
    rename = os.replace
    def replace(src, dst, *args, **kwargs):
        if os.path.basename(dst) == "neighbours.parquet":
            die()
        return rename(src, dst, *args, **kwargs)
    os.replace = replace
from lshjob.cli.app import entry_point
sys.argv = ["lshjob", "run", *sys.argv[2:]]
entry_point()
"""

RACE = r"""
import sys
from pathlib import Path
import polars as pl
from lshjob.index.publish import commit_index, stage_neighbours
for i in range(40):
    out = Path(sys.argv[1])
    stage_neighbours(out, [pl.DataFrame({"writer": [sys.argv[2]], "round": [i]})], {"round": i})
    commit_index(out, {"round": i})
"""


@pytest.fixture(scope="module")
def events(tmp_path_factory) -> Path:
    return planted_events_file(tmp_path_factory)


def blocks(folder: Path) -> int:
    """Bytes of disk held by the files under ``folder`` that have no other link."""
    total = 0
    for root, _dirs, files in os.walk(folder):
        for name in files:
            st = os.lstat(os.path.join(root, name))
            total += st.st_blocks * 512 if st.st_nlink == 1 else 0
    return total


def size_text(n: int) -> str:
    unit, scale = next((u, s) for u, s in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10), ("bytes", 1))
                       if n >= s or s == 1)
    return f"{n} bytes" if scale == 1 else f"{n / scale:.1f} {unit}"


@pytest.mark.parametrize("stage, use_scratch", [("join", True), ("verify", False), ("publish", False)])
def test_a_run_killed_at_a_stage_keeps_the_index_and_the_next_run_cleans_up(tmp_path, events, stage, use_scratch):
    out, scratch = tmp_path / "idx", tmp_path / "scratch"
    run_job(events, SPEC, RunOptions(threshold=0.5), out)
    before = index_digest(out)
    other_output = scratch / "lshjob-work-0123456789abcdef-1"  # another output's work folder
    other_output.mkdir(parents=True)
    killed = subprocess.run(
        [sys.executable, "-c", KILL_AT, stage, str(events), "--entity", "patron", "--element", "title",
         "--threshold", "0.6", "--out", str(out), "--quiet", *(["--scratch", str(scratch)] if use_scratch else [])],
        capture_output=True, text=True, timeout=300,
    )
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    pid = json.loads((out / LOCK_NAME).read_text())["pid"]

    # the index in place is byte for byte the last good one
    assert index_digest(out) == before
    expected = {f".work-{pid}"} if not use_scratch else set()
    if stage == "publish":  # previous/ was made, the new files were staged
        expected |= {f".staging-{pid}", "previous"}
        assert index_digest(out / "previous") == before
    assert set(os.listdir(out)) == {LOCK_NAME, *INDEX} | expected
    left = [out / name for name in expected if name != "previous"]
    if use_scratch:
        [mine] = [p for p in scratch.iterdir() if p != other_output]
        assert mine.name.startswith("lshjob-work-") and mine.name.endswith(f"-{pid}")
        assert (mine / "buckets").is_dir()
        left.append(mine)
    held = sum(blocks(p) for p in left)
    assert held > 0

    manifest = run_job(events, SPEC, RunOptions(threshold=0.6, scratch=str(scratch) if use_scratch else None), out)
    took_over, removed = manifest["warnings"]
    assert f"took over the lock of a run that ended without letting go (pid {pid} on host" in took_over
    assert "that process no longer exists" in took_over
    assert re.fullmatch(rf"removed {len(left)} folder\(s\) left by runs that ended without cleaning up \(.*\): "
                        rf"{re.escape(size_text(held))} reclaimed", removed), removed
    assert all(str(p) in removed for p in left)
    assert set(os.listdir(out)) == {*INDEX, "previous"}
    assert index_digest(out / "previous") == before
    assert json.loads((out / "manifest.json").read_text())["options"]["threshold"] == 0.6
    assert os.listdir(scratch) == [other_output.name]


def test_publishers_racing_without_the_lock_do_not_fail_on_previous(tmp_path):
    # publish_index alone, three processes into one folder, no lock: previous/ used to be
    # removed and made again, and a publisher in between failed with "previous: File exists"
    # (3 times in 3 tries before the change). It is now built apart and renamed into place.
    out = tmp_path / "idx"
    writers = [subprocess.Popen([sys.executable, "-c", RACE, str(out), tag], stderr=subprocess.PIPE, text=True)
               for tag in "abc"]
    errors = [w.communicate(timeout=300)[1] for w in writers]
    assert [w.returncode for w in writers] == [0, 0, 0], errors
    assert sorted(os.listdir(out)) == sorted([*INDEX, "previous"])
    assert sorted(os.listdir(out / "previous")) == sorted(INDEX)
