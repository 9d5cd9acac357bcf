"""Command line of the scheduled rebuild: ``lshjob refresh`` and ``lshjob history``, a thin typer
layer over :mod:`lshjob.jobs.refresh` (registered on the app by :func:`register`)."""

from __future__ import annotations

import sys
from dataclasses import MISSING, fields
from pathlib import Path
from typing import Annotated

import typer

from lshjob.cli.common import emit as _emit
from lshjob.cli.failures import ends_cleanly
from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.config import load_run_config, merge_settings
from lshjob.jobs.options import defaults as run_defaults
from lshjob.jobs.refresh import RefreshOptions, history, refresh_job
from lshjob.runtime.progress import StageProgress

REFRESH_KEYS = {
    "events": str, "store": str, "entity": str, "element": str, "time": str, "period": str, "window": int,
    "threshold": (int, float), "out": str, "top_k": int, "keep": int, "recall": float, "recall_of": str, "seed": int,
    "scheme": str, "sample_size": int, "max_bucket": int, "max_candidates": (int, float),
    "memory": (str, int), "wait": (int, float), "on_null": str, "unicode": str, "full": bool,
    "engine": str, "spark_master": str,
}
# Defaults from where they are declared: RefreshOptions (itself on the run's option table) and
# the spec's fields of that table; nothing repeated here.
REFRESH_DEFAULTS = {
    **{f.name: f.default for f in fields(RefreshOptions) if f.name in REFRESH_KEYS and f.default is not MISSING},
    **{name: value for name, value in run_defaults().items() if name in ("on_null", "unicode")},
}
REQUIRED = ("events", "store", "entity", "element", "time", "period", "window", "threshold", "out")



def refresh_text(manifest: dict) -> str:
    r, plan = manifest["refresh"], manifest["plan"]
    banding = (f"k={plan['perms']}, b={plan['bands']}, r={plan['rows']}, seed {plan['seed']}, {plan['scheme']}"
               if plan.get("bands") else plan["mode"])
    return (f"window {r['window_first']} .. {r['window_last']} ({r['window_periods']} {r['period']} period(s) "
            f"with events, {r['period_rows']} membership rows in its periods)\n"
            f"batch: {r['batch_rows']} events; {r['rows_older_than_window']} older than the window dropped; "
            f"{r['periods_changed']} period(s) changed, {r['periods_expired']} expired; "
            f"{r['changed_entities']} entities changed; {r['pairs_added']} pairs added, "
            f"{r['pairs_removed']} removed, {r.get('pairs_jaccard_changed', 0)} with a changed Jaccard\n"
            f"plan: {banding} ({r['why']}); index by {r['design']}\n"
            f"{manifest['output']['rows']} neighbour rows of {manifest['counts']['entities']} entities -> "
            f"{manifest['out']} in {manifest['seconds']['refresh']['total']} s")


def history_text(found: dict) -> str:
    lines = [f"{'run':<24} {'started':<20} {'window':<23} {'batch':>8} {'changed':>8} {'added':>8} {'removed':>8} "
             f"{'seconds':>8}  output"]
    for run in found["runs"]:
        lines.append(f"{run['run_id']:<24} {run['started_at'][:19]:<20} "
                     f"{run['window_first']} .. {run['window_last']} {run['batch_rows']:>8} "
                     f"{run['changed_entities']:>8} {_count(run['pairs_added']):>8} {_count(run['pairs_removed']):>8} "
                     f"{run['seconds']:>8.2f}  {(run['output_sha256'] or '')[:12]}"
                     + ("" if run["published"] else " (not published)") + (" rebuilt" if run["rebuilt"] else ""))
    plan = found["plan"]
    if plan is not None:
        lines.append(f"kept plan: k={plan['perms']}, b={plan['bands']}, r={plan['rows']}, seed {plan['seed']}, "
                     f"{plan['scheme']} (chosen by {plan['chosen_by']})")
    lines.append(f"{len(found['versions'])} published version(s) kept in {found['store']}/versions")
    return "\n".join(lines)


def _count(value: int | None) -> str:
    return "-" if value is None else str(value)


def register(app: typer.Typer) -> None:
    """Add ``refresh`` and ``history`` to ``app``."""
    app.command("refresh")(ends_cleanly(refresh))
    app.command("history")(ends_cleanly(show_history))


def refresh(
    events: Annotated[str | None, typer.Argument(
        help="The new batch of events: a file, glob or folder, of any time.",
    )] = None,
    store: Annotated[str | None, typer.Option(
        help="Store folder (periods, catalog.duckdb, kept versions); made by the first refresh.",
    )] = None,
    entity: Annotated[str | None, typer.Option(help="Entity column (e.g. patron).")] = None,
    element: Annotated[str | None, typer.Option(help="Element column (e.g. title).")] = None,
    time: Annotated[str | None, typer.Option(help="Column with each event's date/time.")] = None,
    period: Annotated[str | None, typer.Option(help="Period of the store: day, week or month.")] = None,
    window: Annotated[int | None, typer.Option(help="The window: the newest N periods.")] = None,
    threshold: Annotated[float | None, typer.Option(
        help="Jaccard similarity a neighbour must reach, in (0, 1].",
    )] = None,
    out: Annotated[str | None, typer.Option(
        "--out", "-o", help="Index folder (neighbours.parquet, manifest.json).",
    )] = None,
    top_k: Annotated[int | None, typer.Option(help="Neighbours kept per entity.  [default: 50]")] = None,
    keep: Annotated[int | None, typer.Option(help="Published indexes kept in the store.  [default: 3]")] = None,
    recall: Annotated[float | None, typer.Option(
        help="Expected recall the kept plan must still meet.  [default: 0.95]",
    )] = None,
    recall_of: Annotated[str | None, typer.Option(
        help="What --recall is the recall of: 'pairs' (every pair at or above the threshold) or 'lists' "
             "(the --top-k lists published), as lshjob run --recall-of.  [default: pairs]",
    )] = None,
    seed: Annotated[int | None, typer.Option(help="Seed of the hash family.  [default: the kept plan's, or 1]")] = None,
    scheme: Annotated[str | None, typer.Option(help="kperm or oph.  [default: the kept plan's, or kperm]")] = None,
    memory: Annotated[str | None, typer.Option(help="Memory budget, e.g. 8GB.  [default: half the machine]")] = None,
    wait: Annotated[float | None, typer.Option(
        help="Seconds to wait while another refresh holds the store (then exit 75).  [default: 0]",
    )] = None,
    on_null: Annotated[str | None, typer.Option(help="Null keys: error or drop.  [default: error]")] = None,
    full: Annotated[bool, typer.Option(
        "--full", help="Run the whole job over the window instead of updating the last index's state.",
    )] = False,
    engine: Annotated[str | None, typer.Option(
        help="Where the window's index is built: local, or spark (the whole run over the window on Spark).  "
             "[default: local]",
    )] = None,
    spark_master: Annotated[str | None, typer.Option(
        help="Spark master URL for --engine spark, e.g. spark://host:7077, yarn, local[4].  "
             "[default: spark-submit's master, else local[*]]",
    )] = None,
    config: Annotated[Path | None, typer.Option(help="TOML file with any of these options; flags override it.")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bars or summary text.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the manifest as JSON on stdout.")] = False,
) -> None:
    """Fold a batch of events into the store and publish the window's index (the same rows
    lshjob run builds from the window's events with the kept plan).

    Example (nightly, a 3-month window): lshjob refresh exports/loans-2026-03-14.parquet
    --store loans-store --entity patron --element title --time borrowed_at --period month
    --window 3 --threshold 0.5 --out index

    Example (scheduled): lshjob refresh --config nightly.toml

    Example (check against the whole job): lshjob refresh loans.parquet --store loans-store ...
    --full

    Example (the window's index on a cluster): lshjob refresh loans.parquet --store loans-store ...
    --engine spark --spark-master spark://head:7077
    """
    flags = dict(events=events, store=store, entity=entity, element=element, time=time, period=period,
                 window=window, threshold=threshold, out=out, top_k=top_k, keep=keep, recall=recall,
                 recall_of=recall_of, seed=seed,
                 scheme=scheme, memory=memory, wait=wait, on_null=on_null, full=full or None,
                 engine=engine, spark_master=spark_master)
    settings = merge_settings(REFRESH_DEFAULTS,
                              load_run_config(config, REFRESH_KEYS, ("events", "store", "out")) if config else {},
                              flags)
    missing = [name.replace("_", "-") for name in REQUIRED if settings.get(name) is None]
    if missing:
        raise ParameterError(f"lshjob refresh needs {', '.join(missing)} (as options or in --config)")
    spec = EventSpec(entity=settings["entity"], element=settings["element"], time=settings["time"],
                     period=settings["period"], on_null=settings["on_null"], unicode=settings["unicode"])
    options = RefreshOptions(**{k: settings[k] for k in RefreshOptions.__dataclass_fields__})
    with StageProgress(enabled=False if (quiet or as_json) else None) as progress:
        manifest = refresh_job(settings["events"], settings["store"], spec, options, settings["out"], progress,
                               command=sys.argv, say=(lambda _line: None) if quiet else None)
    for warning in manifest.get("warnings", []):
        typer.echo(f"warning: {warning}", err=True)
    _emit(manifest, as_json, quiet, refresh_text(manifest))


def show_history(
    store: Annotated[Path, typer.Argument(help="Store folder written by lshjob refresh.")],
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No summary text.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the history as JSON on stdout.")] = False,
) -> None:
    """List the refreshes of a store: id, start and end, window, batch rows, changed entities,
    seconds and peak memory per stage, plan, output SHA-256.

    Example: lshjob history loans-store --json
    """
    found = history(store)
    _emit(found, as_json, quiet, history_text(found))
