"""One writer per output folder (lshjob/runtime/folder_lock.py), with real processes.

Oracles: the kernel's flock(2) semantics (a lock taken through one open file blocks every
other open of the file, in this process or another, and is dropped when its process dies,
SIGKILL included), /proc/PID/fd for the files a process has open, the pids and host name the
OS reports, and sha256 (hashlib) of the published files before and after.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers import index_digest, planted_events_file
from typer.testing import CliRunner

from lshjob import EventSpec, ParameterError
from lshjob.cli.app import app
from lshjob.errors import Busy
from lshjob.jobs.run import RunOptions, run_job
from lshjob.runtime.folder_lock import LOCK_NAME, output_lock

SPEC = EventSpec(entity="patron", element="title")
HOLD = """
import sys, time
from lshjob.runtime.folder_lock import output_lock
lock = output_lock(sys.argv[1]).acquire()
print("held", flush=True)
time.sleep(120)
"""


@pytest.fixture(scope="module")
def events(tmp_path_factory) -> Path:
    return planted_events_file(tmp_path_factory)


def lshjob_run(events: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "lshjob.cli.app", "run", str(events), "--entity", "patron", "--element", "title",
            "--threshold", "0.5", "--out", str(out), "--quiet", *extra]


def has_open(pid: int, path: Path) -> bool:
    """Whether process ``pid`` has ``path`` open (its /proc/PID/fd links)."""
    target = os.path.realpath(path)
    try:
        fds = os.listdir(f"/proc/{pid}/fd")
    except FileNotFoundError:
        return False
    for fd in fds:
        try:
            if os.readlink(f"/proc/{pid}/fd/{fd}") == target:
                return True
        except OSError:
            pass
    return False


def test_a_second_run_exits_75_at_once_naming_the_holder(tmp_path, events):
    out = tmp_path / "idx"
    run_job(events, SPEC, RunOptions(threshold=0.5), out)
    before = index_digest(out)
    with output_lock(out, what="index"):
        done = subprocess.run(lshjob_run(events, out), capture_output=True, text=True, timeout=300)
        assert sorted(os.listdir(out)) == [LOCK_NAME, "manifest.json", "neighbours.parquet"]  # no work folder
    assert done.returncode == 75, done.stderr[-2000:]
    # the holder is this test process, named by the facts the lock file holds
    assert f"pid {os.getpid()} on host {socket.gethostname()}, started 20" in done.stderr
    assert "another lshjob run holds the lock" in done.stderr and "--wait SECONDS" in done.stderr
    assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
    assert index_digest(out) == before
    assert sorted(os.listdir(out)) == ["manifest.json", "neighbours.parquet"]  # the lock file goes with the lock


def test_wait_gives_up_after_its_seconds_and_leaves_nothing(tmp_path, events):
    out = tmp_path / "idx"
    with output_lock(out):
        start = time.monotonic()
        with pytest.raises(Busy, match=r"holds the lock on this index \(pid .*\); waited 0.3 s"):
            run_job(events, SPEC, RunOptions(threshold=0.5, wait=0.3), out)
        assert 0.3 <= time.monotonic() - start < 5
        assert os.listdir(out) == [LOCK_NAME]
    assert not out.exists()  # the holder made the folder for its lock and removes it, still empty
    with pytest.raises(ParameterError, match="--wait must be 0 or more seconds; got -1"):
        run_job(events, SPEC, RunOptions(threshold=0.5, wait=-1), out)


def test_a_waiting_run_goes_ahead_when_the_holder_lets_go(tmp_path, events):
    out = tmp_path / "idx"
    lock = output_lock(out).acquire()
    try:
        child = subprocess.Popen(lshjob_run(events, out, "--wait", "5", "--json"),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 120
        while not has_open(child.pid, out / LOCK_NAME):  # it is waiting once it has the file open
            assert child.poll() is None, child.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.02)
        time.sleep(0.5)
        assert child.poll() is None  # still waiting
        assert os.listdir(out) == [LOCK_NAME]
    finally:
        lock.release()
    stdout, stderr = child.communicate(timeout=300)
    assert child.returncode == 0, stderr[-2000:]
    manifest = json.loads(stdout)
    assert manifest["warnings"] == [] and manifest["options"]["wait"] == 5
    assert sorted(os.listdir(out)) == ["manifest.json", "neighbours.parquet"]


def test_the_lock_of_a_killed_holder_is_taken_over_and_named(tmp_path, events):
    out = tmp_path / "idx"
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(out)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(Busy, match=rf"\(pid {holder.pid} on host {socket.gethostname()}, started "):
            run_job(events, SPEC, RunOptions(threshold=0.5), out)
    finally:
        holder.send_signal(signal.SIGKILL)
        holder.wait()
    assert json.loads((out / LOCK_NAME).read_text())["pid"] == holder.pid  # left behind by the dead holder
    manifest = run_job(events, SPEC, RunOptions(threshold=0.5), out)
    [note] = manifest["warnings"]
    assert note.startswith(f"{out}: took over the lock of a run that ended without letting go (pid {holder.pid} ")
    assert note.endswith("that process no longer exists)")
    assert json.loads((out / "manifest.json").read_text())["warnings"] == [note]
    assert sorted(os.listdir(out)) == ["manifest.json", "neighbours.parquet"]


def test_flock_decides_not_the_facts_in_the_file(tmp_path, events):
    # A lock file naming a live process (this test's parent) or another host is taken over when
    # no process holds the lock: the facts are for messages. An unreadable file too.
    cases = {
        "alive": {"pid": os.getppid(), "host": socket.gethostname(), "started": "2026-12-01T02:00:00Z",
                  "command": "lshjob run nightly", "what": "index"},
        "elsewhere": {"pid": 4242, "host": "branch-reports-7", "started": "2026-12-01T02:00:00Z",
                      "command": "lshjob run nightly", "what": "index"},
    }
    for name, facts in cases.items():
        out = tmp_path / name
        out.mkdir()
        (out / LOCK_NAME).write_text(json.dumps(facts))
        [note] = run_job(events, SPEC, RunOptions(threshold=0.5), out)["warnings"]
        assert f"(pid {facts['pid']} on host {facts['host']}, started 2026-12-01T02:00:00Z, command: " \
               "lshjob run nightly)" in note
    out = tmp_path / "garbled"
    out.mkdir()
    (out / LOCK_NAME).write_bytes(b"\x00\x17{not json")
    [note] = run_job(events, SPEC, RunOptions(threshold=0.5), out)["warnings"]
    assert "took over a lock a run left without letting go" in note


def test_locks_in_one_process_exclude_each_other_and_can_be_taken_again(tmp_path):
    # flock(2): two opens of one file are independent, even in one process.
    folder = tmp_path / "store"
    with output_lock(folder, what="period store") as first:
        assert first.held and first.notes == []
        with pytest.raises(Busy, match="holds the lock on this period store"):
            output_lock(folder).acquire()
    with output_lock(folder) as again:
        assert again.notes == []  # let go cleanly: nothing to take over
    assert not folder.exists()


def test_wait_and_scratch_from_the_command_line_and_the_config(tmp_path, events):
    bad = CliRunner().invoke(app, ["run", str(events), "--entity", "patron", "--element", "title",
                                   "--threshold", "0.5", "--out", str(tmp_path / "idx"), "--wait", "-1"])
    assert bad.exit_code == 2 and "--wait must be 0 or more seconds" in bad.stderr
    # leftovers of a killed run: in the output, and in the scratch folder under the name the
    # README gives (first 16 hex digits of the SHA-256 of the output's absolute path)
    (tmp_path / "idx" / ".work-999999" / "spill").mkdir(parents=True)
    (tmp_path / "idx" / ".work-999999" / "spill" / "duckdb_temp_block-0.block").write_bytes(b"x" * 300_000)
    out_id = hashlib.sha256(str((tmp_path / "idx").resolve()).encode()).hexdigest()[:16]
    (tmp_path / "scratch" / f"lshjob-work-{out_id}-999998").mkdir(parents=True)
    config = tmp_path / "nightly.toml"
    config.write_text(f'events = "{events}"\nentity = "patron"\nelement = "title"\nthreshold = 0.5\n'
                      f'out = "{tmp_path / "idx"}"\nwait = 1.5\nscratch = "{tmp_path / "scratch"}"\n')
    done = CliRunner().invoke(app, ["run", "--config", str(config), "--json", "--quiet"])
    assert done.exit_code == 0, done.output
    options = json.loads(done.stdout)["options"]
    assert options["wait"] == 1.5 and options["scratch"] == str(tmp_path / "scratch")
    assert re.fullmatch(r"warning: removed 2 folder\(s\) left by runs that ended without cleaning up \(.*\): "
                        r"29\d\.\d KiB reclaimed\n", done.stderr), done.stderr
    assert os.listdir(tmp_path / "scratch") == []


COUNT = """
import sys, time
from pathlib import Path
from lshjob.runtime.folder_lock import output_lock
folder = Path(sys.argv[1])
counter = folder.parent / "counter"
for _ in range(int(sys.argv[2])):
    with output_lock(folder, wait=120):
        n = int(counter.read_text()) if counter.exists() else 0
        time.sleep(0.0005)
        counter.write_text(str(n + 1))
"""


def test_processes_taking_turns_never_hold_the_lock_together(tmp_path):
    # Oracle: a counter read and written back under the lock by three processes; an update is
    # lost whenever two of them hold "the lock" at once (each holder removes the lock file as
    # it lets go, and the next one must not lock a removed file while a third locks a new one).
    rounds = 60
    workers = [subprocess.Popen([sys.executable, "-c", COUNT, str(tmp_path / "out"), str(rounds)],
                                stderr=subprocess.PIPE, text=True) for _ in range(3)]
    errors = [w.communicate(timeout=300)[1] for w in workers]
    assert [w.returncode for w in workers] == [0, 0, 0], errors
    assert int((tmp_path / "counter").read_text()) == 3 * rounds
    assert not (tmp_path / "out").exists() or os.listdir(tmp_path / "out") == []
