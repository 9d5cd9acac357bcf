"""Job configuration from a TOML file, for scheduled runs; command-line flags override it.

Keys are the long option names of ``lshjob run`` with dashes or underscores, for example::

    events = "exports/loans/*.parquet"
    entity = "patron"
    element = "title"
    threshold = 0.5
    out = "index/nightly"
    top-k = 50
    memory = "8GB"            # or a number of bytes: memory = 8000000000

Relative paths in the file (``events``, ``out``) are taken from the file's folder, so a
scheduler may start the job from any folder. A key given both with dashes and with
underscores is an error. The file is UTF-8 (a byte-order mark is allowed).
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path

from lshjob.errors import ParameterError, key_text
from lshjob.jobs.options import config_keys

RUN_KEYS = config_keys()  # from the declared options (lshjob.jobs.options)
PATH_KEYS = ("events", "out", "scratch")  # relative to the configuration file's folder


def load_run_config(path: str | Path, known: dict = RUN_KEYS, path_keys: tuple = PATH_KEYS) -> dict:
    """Read and check a run configuration (``known``: another command's keys and types);
    keys normalised to underscores."""
    path = Path(path)
    if not path.is_file():
        raise ParameterError(f"{path}: no such configuration file")
    data = path.read_bytes()
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise ParameterError(f"{path}: not UTF-8 text: byte 0x{data[exc.start]:02x} at offset {exc.start} "
                             f"(line {line}); save the file as UTF-8") from exc
    try:
        raw = tomllib.loads(text.removeprefix("\ufeff"))  # a byte-order mark is allowed
    except tomllib.TOMLDecodeError as exc:
        raise ParameterError(f"{path}: not valid TOML: {exc}") from exc
    config, spelled = {}, {}
    for key, value in raw.items():
        name = key.replace("-", "_")
        if name in spelled:
            raise ParameterError(f"{path}: {spelled[name]} and {key} are the same option; keep one")
        spelled[name] = key
        if name not in known:
            raise ParameterError(
                f"{path}: unknown key {key!r}; known keys are: {', '.join(k.replace('_', '-') for k in known)}"
            )
        if not isinstance(value, known[name]) or isinstance(value, bool):
            shown = repr(value) if isinstance(value, str) else key_text((value,))
            raise ParameterError(f"{path}: key {key!r} has value {shown}; expected {_kind(known[name])}")
        config[name] = value
    for name in path_keys:
        if name in config:
            if not config[name].strip():  # joined to the file's folder, it would name that folder
                raise ParameterError(f"{path}: key {spelled[name]!r} is empty; give a path")
            config[name] = os.path.join(path.parent, os.path.expanduser(config[name]))
    return config


def _kind(types: tuple[type, ...]) -> str:
    names = {str: "text", int: "a whole number", float: "a number"}
    if set(types) == {int, float}:  # a whole number is a number
        return names[float]
    return " or ".join(names[x] for x in types)


def merge_settings(defaults: dict, config: dict, flags: dict) -> dict:
    """defaults < config file < flags given on the command line (None means not given)."""
    merged = dict(defaults)
    merged.update(config)
    merged.update({k: v for k, v in flags.items() if v is not None})
    return merged
