"""What the ``lshjob`` command prints when its stdout reader has gone, when the option parser
refuses the command line, and when an error text holds control bytes. Each case is a real
child process through the console script's entry point, judged by its exit code (sysexits.h:
0 done, 2 bad input or options), its stderr and what it wrote.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

SPEC = ["--entity", "patron", "--element", "title"]


def closed_stdout(*args, cwd: Path, patch: str = "") -> tuple[int, str]:
    """Run ``lshjob args`` with its stdout a pipe whose reader is gone before the child writes
    (as ``lshjob ... | true``); return the exit code and stderr."""
    script = f"import sys\n{patch}\nfrom lshjob.cli.console import main\nsys.argv = ['lshjob', *sys.argv[1:]]\nmain()\n"
    env = dict(os.environ, XDG_STATE_HOME=str(cwd / "state"))
    child = subprocess.Popen([sys.executable, "-c", script, *map(str, args)], cwd=cwd, env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    child.stdout.close()  # the child takes a second to import before it writes anything
    stderr = child.stderr.read()
    return child.wait(timeout=300), stderr


def lshjob(*args, cwd: Path, patch: str = ""):
    script = f"import sys\n{patch}\nfrom lshjob.cli.console import main\nsys.argv = ['lshjob', *sys.argv[1:]]\nmain()\n"
    env = dict(os.environ, XDG_STATE_HOME=str(cwd / "state"))
    return subprocess.run([sys.executable, "-c", script, *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("args", [["plan", "--threshold", "0.5"], ["plan", "--threshold", "0.5", "--json"],
                                  ["-h"], ["run", "--help"]])
def test_a_command_that_succeeds_exits_0_when_its_reader_is_gone(tmp_path, args):
    code, stderr = closed_stdout(*args, cwd=tmp_path)
    assert (code, stderr) == (0, "")  # no 'Broken pipe', no 'Exception ignored'


def test_a_run_that_published_exits_0_when_its_reader_is_gone(tmp_path, small_events):
    code, stderr = closed_stdout("run", small_events, *SPEC, "--threshold", "0.3", "--out", tmp_path / "idx",
                                 "--json", cwd=tmp_path)
    assert code == 0, stderr
    assert "error" not in stderr and "Broken pipe" not in stderr
    manifest = json.loads((tmp_path / "idx" / "manifest.json").read_text())
    assert manifest["counts"]["events"] == 6  # the conftest table's six loans


@pytest.mark.parametrize("args, message", [
    (["run", "nope.parquet", *SPEC, "--threshold", "0.5", "--out", "idx", "--json"], "nope.parquet"),
    (["plan", "--threshold", "1.5", "--json"], "--threshold"),
])
def test_a_command_that_fails_keeps_its_code_when_its_reader_is_gone(tmp_path, args, message):
    code, stderr = closed_stdout(*args, cwd=tmp_path)
    assert code == 2
    assert stderr.startswith("error: ") and stderr.count("\n") == 1 and message in stderr, stderr


@pytest.mark.parametrize("args, command, says", [
    (["run", "--min-count", "abc"], "run", "--min-count"),
    (["sign", "x.parquet", "--no-such-option"], "sign", "--no-such-option"),
    (["merge", "--out", "m.parquet"], "merge", "sources"),
    (["no-such-command"], "", "no-such-command"),
])
def test_a_usage_error_is_one_line_naming_the_help(tmp_path, args, command, says):
    for as_json in (False, True):
        done = lshjob(*args, *(["--json"] if as_json else []), cwd=tmp_path)
        assert done.returncode == 2
        assert done.stderr.count("\n") == 1 and done.stderr.startswith("error: "), done.stderr
        assert says in done.stderr
        assert done.stderr.rstrip().endswith(f"; see {' '.join(['lshjob', command]).strip()} --help")
        if as_json:
            message = done.stderr[len("error: "):].strip().rsplit("; see ", 1)[0]
            assert json.loads(done.stdout) == {"error": message, "exit": 2}
        else:
            assert done.stdout == ""


def test_lshjob_alone_prints_the_help_on_stdout_and_exits_2(tmp_path):
    done = lshjob(cwd=tmp_path)
    help_text = lshjob("--help", cwd=tmp_path)
    assert (done.returncode, help_text.returncode) == (2, 0)
    assert done.stdout == help_text.stdout and done.stdout.startswith("Usage: lshjob ")
    assert done.stderr == ""


def test_control_bytes_and_newlines_of_an_error_are_escaped_on_one_line(tmp_path, small_events):
    # a value read from a damaged file: NUL, ESC (a terminal colour code), a bell and two lines
    patch = ("import lshjob.jobs.sign\nfrom lshjob.errors import InputError\n"
             "def broken(*a, **k):\n"
             "    raise InputError('x.csv: column title: value \\x00\\x1b[31mred\\x07 is not text\\nsecond line')\n"
             "lshjob.jobs.sign.sign_file = broken\n")
    done = lshjob("sign", small_events, *SPEC, "--out", tmp_path / "s.parquet", "--json", cwd=tmp_path, patch=patch)
    assert done.returncode == 2
    line = "error: x.csv: column title: value \\x00\\x1b[31mred\\x07 is not text; second line\n"
    assert done.stderr == line
    assert json.loads(done.stdout)["error"] == line[len("error: "):].strip()
    assert not any(ord(ch) < 32 for ch in done.stderr.rstrip("\n") + done.stdout.rstrip("\n"))
