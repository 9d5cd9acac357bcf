"""Command line of the index report: ``lshjob report``, a thin typer layer over
:mod:`lshjob.jobs.report` (the data) and :mod:`lshjob.report.page` (the page); registered on the
app by :func:`register`. ``lshjob demo`` writes the same page through :func:`write_report`."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from lshjob.cli.failures import ends_cleanly, to_stdout
from lshjob.errors import ParameterError
from lshjob.index.publish import MANIFEST, NEIGHBOURS
from lshjob.jobs.report import gather
from lshjob.report.page import SECTIONS, write_page
from lshjob.runtime.outputs import output_file


def register(app: typer.Typer) -> None:
    """Add ``report`` to ``app``."""
    app.command("report")(ends_cleanly(report))


def write_report(index: str | Path, out: str | Path, audit: str | Path | dict | None = None,
                 sample: bool = True, store: str | Path | None = None) -> dict:
    """Write the report of the index in ``index`` to ``out``; return its summary."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise ParameterError("lshjob report needs matplotlib (pip install 'lshjob[charts]')") from None
    try:
        import jinja2  # noqa: F401
    except ImportError:
        raise ParameterError("lshjob report needs Jinja2 (pip install 'jinja2>=3.1', a dependency of lshjob)") from None
    data = gather(index, audit, sample, store)
    target = output_file(out, [Path(index) / NEIGHBOURS, Path(index) / MANIFEST], "lshjob report")
    written = write_page(data, target)
    return {"index": str(index), "out": str(written), "bytes": written.stat().st_size,
            "sections": list(SECTIONS), "audit": data.audit is not None,
            "sample_histogram": data.histogram is not None, "forecast": data.forecast is not None,
            "history_runs": len(data.history or []), "notes": data.notes}


def report(
    index: Annotated[str, typer.Argument(help="Index folder (manifest.json, neighbours.parquet).")],
    out: Annotated[str, typer.Option("--out", "-o", help="The HTML file to write.")] = "report.html",
    audit: Annotated[str | None, typer.Option(
        help="The JSON printed by 'lshjob audit --json' on this index: measured recall beside the predicted.",
    )] = None,
    sample: Annotated[bool, typer.Option(
        "--sample/--no-sample",
        help="Redraw the planner's sample similarity histogram from the run's events (when they exist).",
    )] = True,
    store: Annotated[str | None, typer.Option(
        help="A refresh store (lshjob refresh --store): its runs' seconds, memory and entities over time.")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No summary text.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON on stdout.")] = False,
) -> None:
    """Write one self-contained HTML page about an index: the plan's S-curve and threshold,
    predicted and measured recall, seconds and peak memory per stage against the budget,
    bucket sizes and skew handling, candidates and neighbours per entity, forecast curves of
    time, memory and disk against the number of entities (the run a point), and a store's
    history. No network: the figures are inline SVG.

    Example: lshjob report demo-run/index --out report.html

    Example (with the measured recall): lshjob audit index --json > audit.json;
    lshjob report index --audit audit.json --out report.html

    Example (with a store's history): lshjob report nightly/index --store nightly/store --out report.html
    """
    summary = write_report(index, out, audit, sample, store)
    if as_json:
        to_stdout(json.dumps(summary, indent=2, sort_keys=True))
    elif not quiet:
        to_stdout(f"wrote the report of {index} to {summary['out']} ({summary['bytes']} bytes)"
                  + "".join(f"\nnote: {n}" for n in summary["notes"]))
