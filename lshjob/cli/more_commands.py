"""Command line: ``diff`` (two versions of an index) and ``drift`` (entities whose sets
changed across periods). A thin typer layer over :mod:`lshjob.jobs.diff` and
:mod:`lshjob.jobs.drift`; :func:`register` adds the commands to the app."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Optional

import typer

from lshjob.cli.failures import ends_cleanly, to_stdout

Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="No summary text.")]
AsJson = Annotated[bool, typer.Option("--json", help="Print the summary as JSON on stdout.")]


def _emit(summary: dict, as_json: bool, quiet: bool, text: str) -> None:
    if as_json:
        to_stdout(json.dumps(summary, indent=2, sort_keys=True, default=str))
    elif not quiet:
        to_stdout(text)


def _warn(summary: dict) -> None:
    for warning in summary.get("warnings", []):
        typer.echo(f"warning: {warning}", err=True)


@ends_cleanly
def diff(
    old: Annotated[Path, typer.Argument(help="The earlier index folder.")],
    new: Annotated[Path, typer.Argument(help="The later index folder.")],
    out: Annotated[Optional[Path], typer.Option("--out", "-o", help="Write the entities whose top-k list changed (Parquet), most changed first.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Compare two versions of a neighbour index: pairs added, removed and with a changed
    Jaccard (unordered pairs, each counted once), the churn rate (added + removed over the
    pairs in either version), and the entities whose top-k list changed, with how much
    (1 - shared neighbours / neighbours in either list).

    Example: lshjob diff index/previous index --out changed.parquet

    Example (JSON for a nightly log): lshjob diff march-index april-index --json
    """
    from lshjob.jobs.diff import diff_indexes

    summary = diff_indexes(old, new, out)
    _emit(summary, as_json, quiet, diff_text(summary))
    _warn(summary)


def diff_text(s: dict) -> str:
    lines = [
        f"pairs: {s['pairs_old']:,} -> {s['pairs_new']:,}; added {s['pairs_added']:,}, removed "
        f"{s['pairs_removed']:,}, kept {s['pairs_kept']:,} ({s['pairs_jaccard_changed']:,} with a changed Jaccard); "
        f"churn rate {s['churn_rate']:.3f}",
        f"entities: {s['entities_changed']:,} of {s['entities_listed']:,} with a changed top-k list "
        f"({s['entities_changed_rate']:.1%})",
    ]
    for row in s["most_changed"][:5]:
        lines.append(f"  {row['entity']}: {row['entered']} entered, {row['left']} left, "
                     f"{row['kept']} kept (list change {row['list_change']:.2f})")
    if s["out"]:
        lines.append(f"-> {s['out']}")
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    """Add ``diff`` and ``drift`` to ``app``."""
    app.command("diff")(diff)
