"""What every command shares: the --quiet and --json options and how a summary is printed."""

from __future__ import annotations

import json
from typing import Annotated

import typer

from lshjob.cli.failures import to_stdout

Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bars or summary text.")]
AsJson = Annotated[bool, typer.Option("--json", help="Print the summary as JSON on stdout.")]


def emit(summary: dict, as_json: bool, quiet: bool, text: str) -> None:
    """The summary as JSON (``--json``), else ``text`` unless ``--quiet``."""
    if as_json:
        to_stdout(json.dumps(summary, indent=2, sort_keys=True, default=str))
    elif not quiet:
        to_stdout(text)
