"""``lshjob run`` stopped by SIGTERM, SIGINT or SIGHUP, as schedulers, ``timeout`` and Ctrl-C
stop it: one line on stderr, exit code 128 + the signal (130, 143, 129), the work folder,
the staging folder and the lock let go, the index in place byte for byte the last good one.

Each stopped run is a real ``lshjob`` process through the console script's entry point
(:func:`lshjob.cli.console.main`); the script below makes the signal come at a chosen point in
that child only: inside a compiled (numba) loop of the verify stage, inside a DuckDB query
of the join stage, as numba and DuckDB report an interruption (their error wrapping the
stop), and while the index is renamed into place. Oracles: the exit code against
128 + signal.Signals (POSIX shells' convention), sha256 (hashlib) of the published files
before and after, and the folder listings.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers import index_digest, planted_events_file

from lshjob import EventSpec
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")
INDEX = ("neighbours.parquet", "manifest.json")

STOP_AT = r"""
import os, signal, sys, threading, time
import lshjob.jobs.run, lshjob.jobs.parts, lshjob.index.publish, lshjob.index.join.duckdb, lshjob.index.verify.local

how, sig = sys.argv[1], getattr(signal, sys.argv[2])
me = os.getpid()

def later(seconds):  # the signal from another thread, as from outside, while the main thread works
    threading.Timer(seconds, os.kill, (me, sig)).start()

if how == "numba":  # inside a compiled loop of the verify stage
    import numba

    @numba.njit
    def spin(n):
        total = 0
        for i in range(n):
            total = (total * 31 + i) % 1000003
        return total

    spin(10)
    verify = lshjob.index.verify.local.verify_blocks
    def slow_verify(*args, **kwargs):
        later(0.05)
        spin(300_000_000)
        return verify(*args, **kwargs)
    lshjob.index.verify.local.verify_blocks = slow_verify
elif how == "duckdb":  # inside a DuckDB query of the join stage
    import duckdb
    def slow_join(*args, **kwargs):
        later(0.1)
        duckdb.connect().execute("SELECT count(*) FROM range(400000000) a WHERE a.range % 7 = 3").fetchall()
        raise AssertionError("the query was not interrupted")
    lshjob.index.join.duckdb.candidate_pairs = slow_join
elif how in ("numba-error", "duckdb-error"):  # the errors they wrap an interruption in
    def interrupted(*args, **kwargs):
        try:
            os.kill(me, sig)
            time.sleep(5)
        except BaseException as exc:
            if how == "numba-error":
                raise SystemError("CPUDispatcher(<function spin>) returned a result with an exception set") from exc
            raise RuntimeError("Query interrupted") from None
        raise AssertionError("no signal came")
    lshjob.index.verify.local.verify_blocks = interrupted
elif how == "twice":  # a second signal while the first one's clean-up runs
    import shutil
    def stop(*args, **kwargs):
        os.kill(me, sig)
    def remove_again(*args, **kwargs):
        os.kill(me, sig)
        raise AssertionError("the second signal did not end the process")
    lshjob.index.verify.local.verify_blocks = stop
    lshjob.jobs.run.shutil = type("shutil", (), {"rmtree": staticmethod(remove_again)})
elif how == "publish":  # between the renames that put the index in place
    rename = os.replace
    def replace(src, dst, *args, **kwargs):
        if os.path.basename(dst) == "neighbours.parquet":
            os.kill(me, sig)
        return rename(src, dst, *args, **kwargs)
    os.replace = replace

# a child of a process started under nohup inherits SIGHUP ignored, and lshjob keeps a signal
# ignored at start (lshjob.runtime.stopping.install): start this one as a shell would
for stop_signal in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
    signal.signal(stop_signal, signal.SIG_DFL)

from lshjob.cli.console import main
sys.argv = ["lshjob", "run", *sys.argv[3:]]
main()
"""


@pytest.fixture(scope="module")
def events(tmp_path_factory) -> Path:
    return planted_events_file(tmp_path_factory)


def run_args(events: Path, out: Path) -> list[str]:
    return [str(events), "--entity", "patron", "--element", "title", "--threshold", "0.6", "--out", str(out)]


def stopped_cleanly(done, out: Path, before: dict, name: str) -> None:
    """Exit 128 + signal, exactly one line naming it, nothing left beside the index."""
    assert done.returncode == 128 + signal.Signals[name].value, done.stderr[-2000:]
    assert done.stderr.count("\n") == 1 and done.stderr.startswith("error: lshjob run: stopped by " + name), done.stderr
    assert "nothing was published, the previous index is unchanged" in done.stderr
    assert index_digest(out) == before
    assert set(os.listdir(out)) <= {*INDEX, "previous"}  # no .lshjob.lock, .work-*, .staging-*


@pytest.mark.parametrize("how, name", [("numba", "SIGTERM"), ("duckdb", "SIGINT"), ("numba-error", "SIGINT"),
                                       ("duckdb-error", "SIGHUP")])
def test_a_signal_inside_a_stage_stops_the_run_cleanly(tmp_path, events, how, name):
    out = tmp_path / "idx"
    run_job(events, SPEC, RunOptions(threshold=0.5), out)
    before = index_digest(out)
    done = subprocess.run([sys.executable, "-c", STOP_AT, how, name, *run_args(events, out), "--json"],
                          capture_output=True, text=True, timeout=120)
    stopped_cleanly(done, out, before, name)
    record = json.loads(done.stdout)
    assert record == {"error": done.stderr[len("error: "):].strip(), "exit": done.returncode}


def test_a_signal_while_the_index_is_renamed_lets_the_run_finish(tmp_path, events):
    out = tmp_path / "idx"
    run_job(events, SPEC, RunOptions(threshold=0.5), out)
    before = index_digest(out)
    done = subprocess.run([sys.executable, "-c", STOP_AT, "publish", "SIGTERM", *run_args(events, out), "--quiet"],
                          capture_output=True, text=True, timeout=120)
    # the renames are made whole: the run is complete and says the signal came too late to stop it
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stderr.strip().endswith("SIGTERM came after the index was published; the run is complete")
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["options"]["threshold"] == 0.6
    assert manifest["output"]["sha256"] == hashlib.sha256((out / "neighbours.parquet").read_bytes()).hexdigest()
    assert index_digest(out / "previous") == before
    assert set(os.listdir(out)) == {*INDEX, "previous"}


def handled_from(pid: int, signum: int, seconds: float = 60) -> None:
    """Wait until process ``pid`` catches ``signum`` (bit signum-1 of SigCgt in /proc/PID/status,
    proc(5)): before that the interpreter itself is starting, and on a loaded machine that alone
    can take longer than the delays below."""
    status = Path(f"/proc/{pid}/status")
    if not status.exists():
        return  # no procfs: fall back to the delays alone
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        caught = [line for line in status.read_text().splitlines() if line.startswith("SigCgt:")]
        if caught and int(caught[0].split()[1], 16) >> (signum - 1) & 1:
            return
        time.sleep(0.001)
    raise AssertionError(f"process {pid} did not catch signal {signum} within {seconds} s")


@pytest.mark.parametrize("name, after", [("SIGINT", 0.05), ("SIGTERM", 0.4)])
def test_a_signal_while_the_libraries_load_stops_with_one_line(tmp_path, events, name, after):
    # the console script as installed; the signal lands while polars, numba and DuckDB load
    script = Path(sys.executable).with_name("lshjob")
    out = tmp_path / "idx"
    child = subprocess.Popen([str(script), "run", *run_args(events, out)], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
    handled_from(child.pid, getattr(signal, name))
    time.sleep(after)
    child.send_signal(getattr(signal, name))
    stdout, stderr = child.communicate(timeout=120)
    assert child.returncode == 128 + signal.Signals[name].value, stderr
    assert stderr.count("\n") == 1 and f"stopped by {name}" in stderr and stderr.startswith("error: "), stderr
    assert not out.exists() or set(os.listdir(out)) == set()


def test_a_second_signal_while_stopping_ends_the_process_at_once(tmp_path, events):
    out = tmp_path / "idx"
    run_job(events, SPEC, RunOptions(threshold=0.5), out)
    before = index_digest(out)
    done = subprocess.run([sys.executable, "-c", STOP_AT, "twice", "SIGINT", *run_args(events, out)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 130, done.stderr[-2000:]
    assert done.stderr == "lshjob: SIGINT again; stopped at once\n"
    assert index_digest(out) == before  # what the clean-up did not reach, the next run removes (test_killed_runs)
