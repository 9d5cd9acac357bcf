"""Command line: ``diff`` (two versions of an index) and ``drift`` (entities whose sets
changed across periods). A thin typer layer over :mod:`lshjob.jobs.diff` and
:mod:`lshjob.jobs.drift`; :func:`register` adds the commands to the app."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from lshjob.cli.common import AsJson, Quiet
from lshjob.cli.common import emit as _emit
from lshjob.cli.failures import ends_cleanly


def _warn(summary: dict) -> None:
    for warning in summary.get("warnings", []):
        typer.echo(f"warning: {warning}", err=True)


@ends_cleanly
def diff(
    old: Annotated[str, typer.Argument(help="The earlier index folder.")],
    new: Annotated[str, typer.Argument(help="The later index folder.")],
    out: Annotated[Path | None, typer.Option(
        "--out", "-o", help="Write the entities whose top-k list changed (Parquet), most changed first.")] = None,
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


DRIFT_HELP = """Per entity (and segment) and period: how much its set changed against its own
    recent history, estimated from a signature file signed with --period, and the changes the
    population and the noise do not explain (flagged).

    Compared: the similarity (Jaccard) to the entity's previous period, and the containment of
    the new period in the union of its last --history periods (the union's signature is the
    element-wise minimum of theirs), each with its binomial standard error.

    Rule: {rule}

    With --store (a store written by lshjob refresh, over the same events and element), each
    flagged row also gets the elements that entered and left since the period compared with,
    and its exact similarity and containment from the store's sets beside the estimates.

    Example: lshjob sign demo-run/events.parquet --entity patron --element title
    --time borrowed_at --period month --out monthly.parquet; lshjob drift monthly.parquet
    --out drift.parquet --html drift.html

    Example (six months of history, stricter): lshjob drift monthly.parquet --history 6 --z 4
    --out drift.parquet --json

    Example (with neighbour drift): lshjob diff index/previous index --out changed.parquet;
    lshjob drift monthly.parquet --neighbours changed.parquet --out drift.parquet

    Example (the library demo's drifters): lshjob sign demo_data/loans.parquet --entity patron
    --element series --time borrowed_at --period month --out monthly.parquet; lshjob drift
    monthly.parquet --history 6 --out drift.parquet

    Example (checked against the store): lshjob drift monthly.parquet --store store
    --out drift.parquet --json
    """


@ends_cleanly
def drift(
    signatures: Annotated[Path, typer.Argument(help="Signature file signed with --period (and optionally --segment).")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Per entity and period rows to write (Parquet).")],
    history: Annotated[int, typer.Option(help="Periods before each one that make its history.")] = 3,
    z: Annotated[float, typer.Option(help="Flag scores above this many robust standard deviations.")] = 3.5,
    html: Annotated[Path | None, typer.Option(help="Also write a self-contained HTML view (needs matplotlib).")] = None,
    neighbours: Annotated[Path | None, typer.Option(
        help="Entities whose neighbour lists changed (lshjob diff --out), shown beside.")] = None,
    store: Annotated[Path | None, typer.Option(
        help="Store written by lshjob refresh: name what entered and left each flagged set, exactly.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    from lshjob.jobs.drift import drift_file

    if html is not None:
        from lshjob.runtime.outputs import output_file

        html = output_file(html, [signatures], "drift --html", "--html")
        from lshjob.report.drift_html import require_matplotlib

        require_matplotlib()
    rows, summary = drift_file(signatures, out, history=history, z=z, neighbours=neighbours, store=store)
    if html is not None:
        from lshjob.report.drift_html import write_drift_html

        write_drift_html(rows, summary, html)
        summary["html"] = str(html)
    _emit(summary, as_json, quiet, drift_text(summary))
    _warn(summary)


def drift_text(s: dict) -> str:
    lines = [f"{s['rows_compared']:,} of {s['rows']:,} entity-periods compared with their last {s['history']} "
             f"period(s); {s['flagged']:,} flagged ({s['entities_flagged']:,} entities) -> {s['out']}",
             f"{'period':<12}{'compared':>10}{'flagged':>9}{'median similarity':>19}{'typical containment':>21}"]
    for p in s["periods"]:
        if not p["compared"]:
            continue
        lines.append(f"{p['period']:<12}{p['compared']:>10,}{p['flagged']:>9,}"
                     f"{p['median_similarity']:>19.3f}{p['typical_containment']:>21.3f}")
    if s.get("neighbour_drift"):
        nd = s["neighbour_drift"]
        lines.append(f"neighbour lists changed for {nd['entities_list_changed']:,} entities; "
                     f"{nd['also_flagged_latest_period']:,} of them flagged in the latest period, "
                     f"{nd['also_flagged_any_period']:,} in any")
    if s.get("exact"):
        ex = s["exact"]
        lines.append(f"store {ex['store']}: {ex['checked']:,} of {ex['flagged_rows']:,} flagged rows checked; "
                     f"estimates within error: similarity {ex['within_error']['similarity']:,}, "
                     f"containment {ex['within_error']['containment']:,}")
        for r in ex["rows"][:5]:
            lines.append(f"  {r['entity']} {r['period']}: similarity {r['similarity']:.3f} (exact "
                         f"{r['similarity_exact']:.3f}); {r['entered_count']} entered, {r['left_count']} left")
    if s.get("html"):
        lines.append(f"view: {s['html']}")
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    """Add ``diff`` and ``drift`` to ``app``."""
    from lshjob.drift.rule import RULE_TEXT

    app.command("diff")(diff)
    drift.__doc__ = DRIFT_HELP.format(rule=RULE_TEXT)
    app.command("drift")(drift)
