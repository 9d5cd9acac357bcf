"""The run's options are declared once: the command line, the configuration file and the
Python API agree on names and defaults, and every bound refuses a value just outside it."""

import json
import math
import re
from dataclasses import asdict, fields

import pytest
import typer
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.config import load_run_config
from lshjob.jobs.options import RunOptions, config_keys

RUN_COMMAND = typer.main.get_command(app).commands["run"]
OWN = {"config", "quiet", "as_json", "help"}  # the command's own parameters, not run options
SPEC_FIELDS = ("count", "min_count", "on_null", "unicode")  # EventSpec fields lshjob run takes


def cli_options() -> dict:
    return {p.name: p for p in RUN_COMMAND.params if p.name not in OWN}


def shown_default(param) -> str | None:
    match = re.search(r"\[default: (.+)\]$", " ".join(param.help.split())) if param.help else None
    return match.group(1) if match else None


def test_cli_options_dataclass_fields_and_config_keys_are_the_same_names():
    # Oracle: the dataclasses' own fields (RunOptions, EventSpec) and typer's parameters.
    # ``engines`` (stage by stage) is chosen from the Python API only; ``--engine`` chooses one for all.
    api = {f.name for f in fields(RunOptions)} - {"engines"} | set(SPEC_FIELDS) | {"events", "entity", "element", "out"}
    assert set(cli_options()) == api == set(config_keys())


def test_cli_defaults_are_the_dataclass_defaults():
    # Oracle: dataclasses.fields of RunOptions and EventSpec, against typer's help texts.
    defaults = {f.name: f.default for f in fields(RunOptions) if f.name != "threshold"}
    defaults |= {f.name: f.default for f in fields(EventSpec) if f.name in SPEC_FIELDS}
    for name, param in cli_options().items():
        assert param.default is None, name  # not given: the configuration file may give it
        if name not in defaults or defaults[name] is None:
            continue
        shown = shown_default(param)
        assert shown is not None, name
        value = defaults[name]
        if isinstance(value, (int, float)):
            assert float(shown) == pytest.approx(value, rel=0), (name, shown, value)
        else:
            assert shown == value, name


def test_a_run_from_flags_and_from_a_config_gets_the_api_defaults(tmp_path, small_events):
    # Oracle: asdict of the Python API's RunOptions and EventSpec built with only the required values.
    runner = CliRunner()
    flags = runner.invoke(app, ["run", str(small_events), "--entity", "patron", "--element", "title",
                                "--threshold", "0.5", "--out", str(tmp_path / "a"), "--json", "--quiet"])
    assert flags.exit_code == 0, flags.output
    config = tmp_path / "job.toml"
    config.write_text(f'events = "{small_events}"\nentity = "patron"\nelement = "title"\nthreshold = 0.5\n'
                      f'out = "{tmp_path / "b"}"\n')
    from_config = runner.invoke(app, ["run", "--config", str(config), "--json", "--quiet"])
    assert from_config.exit_code == 0, from_config.output
    for result in (flags, from_config):
        manifest = json.loads(result.stdout)
        assert manifest["options"] == asdict(RunOptions(threshold=0.5))
        assert manifest["spec"] == asdict(EventSpec(entity="patron", element="title"))


def test_every_config_key_takes_its_default(tmp_path):
    # Oracle: the Python API's defaults, written as TOML and read back (tomllib).
    values = asdict(RunOptions(threshold=0.5)) | {k: v for k, v in asdict(EventSpec("p", "t")).items()
                                                  if k in SPEC_FIELDS}
    values = {k: v for k, v in values.items() if v is not None and k != "engines"}  # engines: API only
    body = "".join(f"{k.replace('_', '-')} = {json.dumps(v)}\n" for k, v in values.items())
    (tmp_path / "job.toml").write_text(body)
    assert load_run_config(tmp_path / "job.toml") == values


BELOW, ABOVE = -math.inf, math.inf

# (option, value just outside, expected as the message says it) - written out here, not read
# from the table, so a changed bound or message fails.
OUTSIDE = [
    ("threshold", 0.0, "in (0, 1]"),
    ("threshold", math.nextafter(1.0, ABOVE), "in (0, 1]"),
    ("top_k", 0, "from 1 to 2147483647"),
    ("top_k", 2**31, "from 1 to 2147483647"),
    ("perms", 0, "at least 1"),
    ("bands", 0, "at least 1"),
    ("rows", 0, "at least 1"),
    ("recall", 0.0, "in (0, 1)"),
    ("recall", 1.0, "in (0, 1)"),
    ("sample_size", 1, "at least 2"),
    ("max_bucket", 1, "at least 2"),
    ("max_candidates", math.nextafter(0.0, BELOW), "0 or more"),
    ("parts", 0, "at least 1"),
    ("wait", math.nextafter(0.0, BELOW), "0 or more seconds"),
    ("scheme", "minhash", "one of kperm, oph"),
]


@pytest.mark.parametrize("name, value, expected", OUTSIDE)
def test_each_bound_refuses_a_value_just_outside_it(name, value, expected):
    # Oracle: the message form of the house style, "--threshold must be in (0, 1); got 1.5".
    given = {"threshold": 0.5, "perms": 128, "bands": 4, "rows": 4}
    if name in ("bands", "rows"):
        given |= {"bands": 1, "rows": 1}
    with pytest.raises(ParameterError) as refused:
        RunOptions(**(given | {name: value})).validate()
    flag = "--" + name.replace("_", "-")
    shown = repr(value) if isinstance(value, str) else (str(int(value)) if value == int(value) else repr(value))
    assert str(refused.value) == f"{flag} must be {expected}; got {shown}"


@pytest.mark.parametrize("name, value", [
    ("threshold", 1.0), ("threshold", math.nextafter(0.0, ABOVE)), ("top_k", 1), ("top_k", 2**31 - 1),
    ("recall", math.nextafter(1.0, BELOW)), ("sample_size", 2), ("max_bucket", 2), ("max_candidates", 0.0),
    ("parts", 1), ("wait", 0.0), ("scheme", "oph"),
])
def test_each_bound_keeps_the_value_on_its_inside(name, value):
    RunOptions(**{"threshold": 0.5, name: value}).validate()


def test_the_command_line_refuses_with_the_same_message(tmp_path, small_events):
    result = CliRunner().invoke(app, ["run", str(small_events), "--entity", "patron", "--element", "title",
                                      "--threshold", "0.5", "--recall", "1", "--out", str(tmp_path / "idx")])
    assert result.exit_code == 2
    assert "--recall must be in (0, 1); got 1" in result.stderr
    assert not (tmp_path / "idx").exists()
