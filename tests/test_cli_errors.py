"""How the ``lshjob`` command ends, run as a scheduler runs it: in a child process, judged by
its exit code (sysexits.h: 0 done, 1 a check failed, 2 bad input or options, 70 internal
error, 75 busy), its one line on stderr, and what it leaves on disk. Most cases fail while
checking options, before any compiled code runs, so each child costs about a second."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import polars as pl
import pytest

from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.sign import merge_files, sign_file
from lshjob.runtime.budget import parse_size, physical_memory

SPEC = ["--entity", "patron", "--element", "title"]


def lshjob(*args, cwd, patch: str = "", state=None):
    """Run ``lshjob args`` in a child process through the console script's entry point;
    ``patch`` is Python run in the child first (to plant a fault there only)."""
    script = (f"import sys\nimport lshjob.cli.app\n{patch}\n"
              "sys.argv = ['lshjob', *sys.argv[1:]]\nlshjob.cli.app.entry_point()\n")
    env = dict(os.environ, XDG_STATE_HOME=str(state or cwd / "state"))
    return subprocess.run([sys.executable, "-c", script, *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)


def one_error_line(done) -> str:
    """The child's stderr must be exactly one line starting with 'error: '; returns it."""
    assert done.stderr.startswith("error: ") and done.stderr.count("\n") == 1, done.stderr
    assert "Traceback" not in done.stderr + done.stdout
    return done.stderr.strip()


def test_dash_h_is_help_and_help_lists_the_exit_codes(tmp_path):
    for args in (["-h"], ["run", "-h"]):
        done = lshjob(*args, cwd=tmp_path)
        assert done.returncode == 0, done.stderr
        codes = done.stdout[done.stdout.index("Exit codes:"):].split("\n")
        assert [line.split()[0] for line in codes[1:6]] == ["0", "1", "2", "70", "75"]
        assert "internal error" in codes[4] and "busy" in codes[5]


def test_every_command_help_lists_the_exit_codes():
    from typer.testing import CliRunner

    from lshjob.cli.app import app

    for command in app.registered_commands:
        result = CliRunner().invoke(app, [command.name or command.callback.__name__, "-h"])
        assert result.exit_code == 0 and "Exit codes:\n    0   done" in result.output


def test_a_usage_error_keeps_exit_2_and_is_json_under_json(tmp_path):
    done = lshjob("sign", "--no-such-option", "--json", cwd=tmp_path)
    assert done.returncode == 2
    assert "No such option: --no-such-option" in done.stderr
    assert json.loads(done.stdout) == {"error": "No such option: --no-such-option", "exit": 2}


def test_an_internal_error_is_one_line_exit_70_with_the_traceback_logged(tmp_path, small_events):
    # A bug planted in the child only: the API function the command calls raises.
    patch = ("import lshjob.jobs.sign\n"
             "def broken(*args, **kwargs):\n"
             "    raise RuntimeError('planted fault')\n"
             "lshjob.jobs.sign.sign_file = broken\n")
    done = lshjob("sign", small_events, *SPEC, "--out", tmp_path / "s.parquet", cwd=tmp_path, patch=patch)
    assert done.returncode == 70
    line = one_error_line(done)
    assert "internal error in lshjob sign (RuntimeError: planted fault)" in line
    logs = list((tmp_path / "state" / "lshjob").glob("lshjob-*.log"))
    assert len(logs) == 1 and str(logs[0]) in line
    text = logs[0].read_text()
    assert "Traceback (most recent call last)" in text and "def broken" not in text
    assert 'lshjob/cli/app.py", line' in text and "in broken" in text and text.endswith("RuntimeError: planted fault\n")
    assert not (tmp_path / "s.parquet").exists()
    again = lshjob("sign", small_events, *SPEC, "--out", tmp_path / "s.parquet", "--json", cwd=tmp_path, patch=patch)
    record = json.loads(again.stdout)
    assert record["exit"] == 70 and "planted fault" in record["error"]
    assert os.path.exists(record["log"]) and record["log"] in again.stderr


def test_tracebacks_go_to_the_temporary_folder_when_the_state_folder_cannot_be_made(tmp_path, monkeypatch):
    import tempfile

    from lshjob.cli.failures import log_folder

    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "state"))
    assert log_folder() == tmp_path / "state" / "lshjob"
    (tmp_path / "plain").write_text("a file, not a folder")
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "plain"))
    assert log_folder() == Path(tempfile.gettempdir())


def test_lshjob_errors_are_json_on_stdout_under_json(tmp_path, small_events):
    done = lshjob("sign", small_events, "--entity", "reader", "--element", "title", "--out", tmp_path / "s.parquet",
                  "--json", cwd=tmp_path)
    assert done.returncode == 2
    line = one_error_line(done)
    assert json.loads(done.stdout) == {"error": line.removeprefix("error: "), "exit": 2}
    assert "column 'reader'" in line


def test_memory_sizes_in_decimal_binary_and_single_letter_units():
    # IEC 80000-13: KiB/MiB/GiB are powers of 2, kB/MB/GB powers of 10; a bare letter as in
    # 8g is binary (the convention of JVM and container memory limits: common practice).
    assert parse_size("8G") == parse_size("8g") == parse_size("8GiB") == 8 * 2**30
    assert parse_size("8GB") == parse_size("8gb") == 8 * 10**9
    assert parse_size("512MiB") == parse_size("512m") == 512 * 2**20
    assert parse_size("1.5GB") == 1_500_000_000
    assert parse_size("600000000") == 600_000_000


def test_a_budget_above_the_machine_is_refused_at_once(tmp_path, small_events):
    done = lshjob("run", small_events, *SPEC, "--threshold", "0.5", "--out", tmp_path / "index", "--memory", "100TB",
                  cwd=tmp_path)
    assert done.returncode == 2
    machine = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    assert one_error_line(done) == f"error: --memory 100TB is more than this machine's {machine:.1f} GiB"
    assert not (tmp_path / "index").exists()
    assert physical_memory() < 100 * 10**12


def test_a_budget_below_the_smallest_is_refused_with_its_value(tmp_path, small_events):
    done = lshjob("run", small_events, *SPEC, "--threshold", "0.5", "--out", tmp_path / "index", "--memory", "100MB",
                  cwd=tmp_path)
    assert done.returncode == 2
    assert "--memory must be at least 512MiB; got '100MB'" in one_error_line(done)
    assert not (tmp_path / "index").exists()


@pytest.mark.parametrize("option, value, message", [
    ("--top-k", "99999999999999999999", "--top-k 99999999999999999999 is out of range"),
    ("--top-k", "3000000000", "--top-k must be from 1 to 2147483647; got 3000000000"),
    ("--max-candidates", "-1", "--max-candidates must be 0 or more; got -1"),
])
def test_out_of_range_numbers_are_one_line(tmp_path, small_events, option, value, message):
    done = lshjob("run", small_events, *SPEC, "--threshold", "0.5", "--out", tmp_path / "index", option, value,
                  cwd=tmp_path)
    assert done.returncode == 2
    assert message in one_error_line(done)
    assert not (tmp_path / "index").exists()


def test_plan_takes_on_null_as_its_error_advises(tmp_path):
    # Oracle: the sample without its null-key row has 3 entities, so sampling draws 3.
    events = tmp_path / "events.parquet"
    pl.DataFrame({"patron": ["ann", "ann", None, "bob", "cy"],
                  "title": ["t1", "t2", "t1", "t1", "t2"]}).write_parquet(events)
    refused = lshjob("plan", "--threshold", "0.5", "--sample", events, *SPEC, cwd=tmp_path)
    assert refused.returncode == 2
    assert "pass --on-null drop" in one_error_line(refused)
    done = lshjob("plan", "--threshold", "0.5", "--sample", events, *SPEC, "--on-null", "drop", "--json", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["sample"]["sampled_entities"] == 3


def test_plan_at_threshold_one_is_identical_sets_only(tmp_path):
    done = lshjob("plan", "--threshold", "1.0", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("identical-only mode: threshold 1.0: only identical sets qualify")
    assert "None" not in done.stdout
    refused = lshjob("plan", "--threshold", "1.5", cwd=tmp_path)
    assert refused.returncode == 2 and "--threshold must be in (0, 1]; got 1.5" in one_error_line(refused)


def test_no_python_reprs_in_the_sign_summary(tmp_path, small_events):
    # ann's February set (t2 twice, 3 loans) stays; her January set (t1 once) is emptied by
    # --min-count 2; the example must read as text, not as a tuple of Python objects.
    done = lshjob("sign", small_events, *SPEC, "--segment", "branch", "--time", "borrowed_at", "--period", "month",
                  "--count", "loans", "--min-count", "2", "--out", tmp_path / "s.parquet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "(e.g. ann, Harbour, 2026-01-01)" in done.stdout
    assert "datetime" not in done.stdout and "('" not in done.stdout


def test_sign_and_run_end_alike_when_every_key_is_null(tmp_path):
    events = tmp_path / "nulls.parquet"
    pl.DataFrame({"patron": pl.Series([None, None], dtype=pl.String), "title": ["t1", "t2"]}).write_parquet(events)
    sign = lshjob("sign", events, *SPEC, "--on-null", "drop", "--out", tmp_path / "s.parquet", cwd=tmp_path)
    run = lshjob("run", events, *SPEC, "--on-null", "drop", "--threshold", "0.5", "--out", tmp_path / "index",
                 cwd=tmp_path)
    assert sign.returncode == run.returncode == 2
    assert one_error_line(sign) == one_error_line(run)
    assert not (tmp_path / "s.parquet").exists() and not (tmp_path / "index").exists()


def test_config_paths_are_relative_to_the_config_file(tmp_path):
    folder = tmp_path / "jobs"
    folder.mkdir()
    pl.DataFrame({"patron": ["ann"] * 3 + ["bob"] * 4 + ["cy"],  # ann and bob: Jaccard 3/4
                  "title": ["t1", "t2", "t3", "t1", "t2", "t3", "t4", "t9"]}).write_parquet(folder / "loans.parquet")
    (folder / "nightly.toml").write_text('events = "loans.parquet"\nentity = "patron"\nelement = "title"\n'
                                         'threshold = 0.5\nout = "index"\ntop-k = 5\n')
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    done = lshjob("run", "--config", folder / "nightly.toml", "--quiet", cwd=elsewhere)
    assert done.returncode == 0, done.stderr
    manifest = json.loads((folder / "index" / "manifest.json").read_text())
    assert os.path.samefile(manifest["inputs"]["source"], folder / "loans.parquet")
    assert pl.read_parquet(folder / "index" / "neighbours.parquet")["entity"].sort().to_list() == ["ann", "bob"]
    assert list(elsewhere.iterdir()) == [elsewhere / "state"] or list(elsewhere.iterdir()) == []


def test_a_config_key_spelled_both_ways_is_refused(tmp_path):
    (tmp_path / "job.toml").write_text('top-k = 5\ntop_k = 7\n')
    done = lshjob("run", "--config", "job.toml", cwd=tmp_path)
    assert done.returncode == 2
    assert one_error_line(done) == "error: job.toml: top-k and top_k are the same option; keep one"


@pytest.mark.parametrize("patrons", ["0", "-5"])
def test_demo_with_bad_options_leaves_no_folder(tmp_path, patrons):
    done = lshjob("demo", "--out", "d", "--patrons", patrons, cwd=tmp_path)
    assert done.returncode == 2
    assert f"--patrons must be from 100 to 1000000; got {patrons}" in one_error_line(done)
    assert not (tmp_path / "d").exists()


def test_demo_failing_midway_removes_the_folder_it_made(tmp_path):
    patch = ("import lshjob.cli.app\n"
             "def broken(*args, **kwargs):\n"
             "    raise RuntimeError('planted fault')\n"
             "lshjob.cli.app.run_job = broken\n")
    done = lshjob("demo", "--out", "d", "--patrons", "100", cwd=tmp_path, patch=patch)
    assert done.returncode == 70 and "planted fault" in one_error_line(done)
    assert not (tmp_path / "d").exists()


def test_sign_onto_its_input_is_refused_and_the_input_kept(tmp_path, small_events):
    before = small_events.read_bytes()
    done = lshjob("sign", small_events.name, *SPEC, "--out", small_events.name, cwd=tmp_path)
    assert done.returncode == 2
    assert one_error_line(done) == "error: --out loans.parquet is one of the inputs; choose another path"
    assert small_events.read_bytes() == before


def test_merge_onto_an_input_is_refused_and_the_input_kept(tmp_path, small_events):
    sigs = tmp_path / "sigs.parquet"
    sign_file(small_events, sigs, EventSpec(entity="patron", element="title"))
    before = sigs.read_bytes()
    done = lshjob("merge", "sigs.parquet", "--out", "./sigs.parquet", cwd=tmp_path)
    assert done.returncode == 2
    assert one_error_line(done) == "error: --out ./sigs.parquet is one of the inputs; choose another path"
    assert sigs.read_bytes() == before


def test_outputs_over_inputs_are_refused_through_the_python_api(tmp_path, small_events):
    spec = EventSpec(entity="patron", element="title")
    folder = tmp_path / "exports"
    folder.mkdir()
    (folder / "a.parquet").write_bytes(small_events.read_bytes())
    os.link(small_events, tmp_path / "hard.parquet")
    cases = [
        (folder, folder / "sigs.parquet", "is in the input folder"),
        (str(folder / "*.parquet"), folder / "a.parquet", "is one of the inputs"),
        (str(folder / "*.parquet"), folder / "new.parquet", "matches the input pattern"),
        (small_events, tmp_path / "hard.parquet", "is one of the inputs"),  # a hard link to the input
    ]
    for source, out, message in cases:
        with pytest.raises(ParameterError, match=message):
            sign_file(source, out, spec)
    assert sorted(p.name for p in folder.iterdir()) == ["a.parquet"]
    sigs = tmp_path / "sigs.parquet"
    sign_file(small_events, sigs, spec)
    with pytest.raises(ParameterError, match="is one of the inputs"):
        merge_files([sigs, sigs], sigs)


def test_run_onto_its_input_is_refused(tmp_path, small_events):
    before = small_events.read_bytes()
    done = lshjob("run", "loans.parquet", *SPEC, "--threshold", "0.5", "--out", "loans.parquet", cwd=tmp_path)
    assert done.returncode == 2
    assert one_error_line(done) == "error: --out loans.parquet is one of the inputs; choose another path"
    assert small_events.read_bytes() == before


@pytest.mark.parametrize("content, problem", [
    ('{"spec": {"entity": "patron"', "not valid JSON"),
    ('{"format": "lshjob-index", "format_version": 1}', "not an lshjob manifest (no 'run_id' entry)"),
    ('{"format": "lshjob-index", "format_version": 9}', "manifest format version 9 is not supported"),
    ('{"spec": {}, "plan": {}, "options": {"threshold": 0.5}}', "not an lshjob manifest (format None; "),
])
def test_audit_of_a_damaged_manifest_is_one_line_naming_it(tmp_path, content, problem):
    (tmp_path / "index").mkdir()
    (tmp_path / "index" / "manifest.json").write_text(content)
    done = lshjob("audit", "index", cwd=tmp_path)
    assert done.returncode == 2
    line = one_error_line(done)
    assert line.startswith(f"error: {os.path.join('index', 'manifest.json')}: {problem}")


def test_an_empty_path_in_a_config_is_refused(tmp_path):
    # Oracle: the folder's listing. Joined to the config file's folder, out = "" would have
    # published into that folder.
    for key in ("out", "events", "scratch"):
        config = tmp_path / f"{key}.toml"
        values = {"events": '"loans.parquet"', "entity": '"patron"', "element": '"title"', "threshold": "0.5",
                  "out": '"idx"', key: '"  "'}
        config.write_text("".join(f"{k} = {v}\n" for k, v in values.items()))
        before = sorted(p.name for p in tmp_path.iterdir())
        done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", "--config", str(config)],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 2 and done.stderr.count("\n") == 1, done.stderr
        assert f"key '{key}' is empty" in done.stderr
        assert sorted(p.name for p in tmp_path.iterdir()) == before
