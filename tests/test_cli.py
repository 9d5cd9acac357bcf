"""The command line: help with examples, JSON summaries, exit codes, no half-written output."""

import json

import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app

runner = CliRunner()
COMMANDS = [c.name or c.callback.__name__ for c in app.registered_commands]


def test_top_level_help_has_an_example():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0 and "Example: lshjob" in result.output


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_help_has_an_example(command):
    result = runner.invoke(app, [command, "--help"])
    assert result.exit_code == 0
    assert "Example" in result.output and "lshjob " + command in result.output


def test_sign_json_summary_and_merge(tmp_path, small_events):
    out = tmp_path / "sigs.parquet"
    result = runner.invoke(
        app,
        ["sign", str(small_events), "--entity", "patron", "--element", "title", "--time", "borrowed_at",
         "--period", "month", "--perms", "16", "--out", str(out), "--json"],
    )
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["signatures"] == 5 and summary["k"] == 16
    merged = tmp_path / "all.parquet"
    result = runner.invoke(app, ["merge", str(out), "--out", str(merged), "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["rows_out"] == 3
    assert pl.read_parquet(merged)["entity"].to_list() == ["ann", "bob", "cy"]


def test_bad_column_exits_non_zero_with_a_clear_message(tmp_path, small_events):
    out = tmp_path / "sigs.parquet"
    result = runner.invoke(app, ["sign", str(small_events), "--entity", "reader", "--element", "title",
                                 "--out", str(out)])
    assert result.exit_code == 2
    assert "column 'reader'" in result.stderr and "columns are: patron" in result.stderr
    assert "Traceback" not in result.output
    assert not out.exists()


def test_demo_writes_events_and_signatures(tmp_path):
    result = runner.invoke(app, ["demo", "--out", str(tmp_path / "d"), "--patrons", "300", "--json", "--quiet"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["sign"]["signatures"] == 300
    assert (tmp_path / "d" / "events.parquet").exists()
    assert summary["report"]["out"] == str(tmp_path / "d" / "report.html")
    assert (tmp_path / "d" / "report.html").read_text().startswith("<!DOCTYPE html>")


def test_an_output_that_cannot_be_written_is_one_line_and_exit_2(tmp_path, small_events):
    # An output folder under a regular file cannot be made: the message names the path and the
    # file in the way, the exit code is 2 like every bad input, and no traceback is printed.
    (tmp_path / "plain.txt").write_text("not a folder")
    out = tmp_path / "plain.txt" / "sigs.parquet"
    result = runner.invoke(app, ["sign", str(small_events), "--entity", "patron", "--element", "title",
                                 "--out", str(out), "--quiet"])
    assert result.exit_code == 2
    assert result.output == f"error: --out {out}: {tmp_path / 'plain.txt'} is a file, not a folder\n"


def test_the_command_skips_numbas_blas_probe_and_leaves_linear_algebra_working():
    # In a fresh process, as the `lshjob` command starts: numba's first compiled call must
    # not import scipy.linalg (0.2 s a command, measured), lshjob's kernels must still load,
    # and numba code that does linear algebra, and scipy.linalg itself, must still work.
    import subprocess
    import sys

    script = """
import sys
from lshjob.cli.app import _skip_blas_probe
_skip_blas_probe()
import numba, numpy as np
from lshjob.ingest import grouping
table = np.array([0, 1, 2], dtype=np.int64)
assert list(grouping.lookup(table, 10, np.array([12, 10], dtype=np.int64))) == [2, 0]
assert "scipy.linalg" not in sys.modules, "the probe imported scipy.linalg"
assert "scipy.linalg.cython_blas" not in sys.modules, "the blocking entry was left behind"
dot = numba.njit(lambda a, b: np.dot(a, b))
assert dot(np.ones((2, 3)), np.ones(3)).tolist() == [3.0, 3.0]
import scipy.linalg
assert scipy.linalg.det(np.eye(2)) == 1.0
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
