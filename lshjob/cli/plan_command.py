"""Command line of planning: ``lshjob plan`` (choose k, b, r; forecast the run) and ``lshjob
calibrate`` (fit the cost model to this machine), a thin typer layer over
:mod:`lshjob.jobs.plan` and :mod:`lshjob.jobs.calibrate`; registered on the app by :func:`register`."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from lshjob.cli.common import AsJson, Quiet
from lshjob.cli.common import emit as _emit
from lshjob.cli.failures import ends_cleanly
from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import plan as api
from lshjob.jobs.calibrate import calibrate as calibrate_model
from lshjob.jobs.calibrate import refine_sources
from lshjob.jobs.options import default_of
from lshjob.plan.choose import PLAN_BY
from lshjob.plan.cost import load_model
from lshjob.report.charts import write_chart
from lshjob.report.text import forecast_report, plan_report
from lshjob.runtime.budget import parse_size
from lshjob.runtime.outputs import output_file


def register(app: typer.Typer) -> None:
    """Add ``plan`` and ``calibrate`` to ``app``."""
    app.command("plan")(ends_cleanly(plan))
    app.command("calibrate")(ends_cleanly(calibrate))


def plan(
    threshold: Annotated[float, typer.Option(
        help="Jaccard similarity a pair must reach, in (0, 1]; 1 pairs identical sets only.")],
    perms: Annotated[int | None, typer.Option(
        help="Signature length k (default: 128 in theory mode; chosen in data mode).")] = None,
    recall: Annotated[float, typer.Option(
        help="Data mode: expected recall of pairs at or above the threshold (or of the top-k lists: "
             "--recall-of).")] = default_of("recall"),
    recall_of: Annotated[str, typer.Option(
        help="Data mode: what --recall is the recall of: 'pairs' (every pair at or above the threshold) or "
             "'lists' (the --top-k lists the run publishes), as lshjob run --recall-of.")] = default_of("recall_of"),
    sample: Annotated[str | None, typer.Option(help="Signature file or events to plan from (data mode).")] = None,
    entity: Annotated[str | None, typer.Option(help="Events sample: entity column.")] = None,
    element: Annotated[str | None, typer.Option(help="Events sample: element column.")] = None,
    on_null: Annotated[str, typer.Option(help="Events sample: null keys 'error' or 'drop' the row.")] = "error",
    sample_size: Annotated[int, typer.Option(help="Entities drawn from the sample.")] = default_of("sample_size"),
    entities: Annotated[int | None, typer.Option(
        help="Scale pair counts to this many entities (e.g. next quarter's); the forecast's size.")] = None,
    events: Annotated[int | None, typer.Option(
        help="Events at the forecast's size.  [default: the sample's events per entity x --entities]")] = None,
    fp_weight: Annotated[float, typer.Option(help="Theory mode: weight of the false-positive area.")] = 0.5,
    fn_weight: Annotated[float, typer.Option(help="Theory mode: weight of the false-negative area.")] = 0.5,
    bands: Annotated[int | None, typer.Option(help="Judge this number of bands instead of choosing.")] = None,
    rows: Annotated[int | None, typer.Option(help="Judge this number of rows per band instead of choosing.")] = None,
    chart: Annotated[Path | None, typer.Option(help="Write the S-curve chart (.svg or .png).")] = None,
    seed: Annotated[int, typer.Option(help="Seed for drawing the sample.")] = 0,
    max_candidates: Annotated[float | None, typer.Option(
        help="Refuse plans predicting more candidate pairs, as lshjob run does.")] = None,
    plan_by: Annotated[str, typer.Option(
        help="Data mode: 'candidates' (fewest expected candidate pairs, what lshjob run does) or 'cost' "
             "(least predicted seconds; with --scheme oph k up to 1024).")] = "candidates",
    scheme: Annotated[str, typer.Option(help="Signature scheme the run will use: kperm or oph.")] = default_of(
        "scheme"),
    top_k: Annotated[int, typer.Option(help="Neighbours an entity the run keeps (published rows).")] = default_of(
        "top_k"),
    memory: Annotated[str | None, typer.Option(
        help="Memory budget of the run, e.g. 8GB: whether it goes in parts.  [default: half the machine]")] = None,
    history: Annotated[list[str] | None, typer.Option(
        help="Index folder, manifest.json or refresh store of a real run: refines the forecast; runs of fewer "
             "entities than --entities (of --sample, best two sizes) are scaled to it instead (repeatable).")] = None,
    report: Annotated[Path | None, typer.Option(
        help="Write an HTML page of the plan and its forecast (S-curve, per stage, curves against N).")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Choose bands b and rows r (and k) for a Jaccard threshold; from a sample, forecast the
    run's seconds, peak memory and disk.

    Example (theory): lshjob plan --threshold 0.5 --perms 128

    Example (data, forecast at 5 million patrons, 200 million loans): lshjob plan --threshold 0.5
    --sample demo_data/loans.parquet --entity patron --element title --entities 5000000 --events 200000000

    Example (plan by predicted seconds, refined by a real run): lshjob plan --threshold 0.5
    --sample demo_data/loans.parquet --entity patron --element title --plan-by cost --scheme oph
    --history demo-run/index --report plan.html

    Example (scaled from runs of a 10% sample and a quarter of it): lshjob plan --threshold 0.5
    --sample sample.parquet --entity patron --element title --entities 10000000 --events 400000000
    --history smaller-index --history sample-index

    Example (judge a given plan): lshjob plan --threshold 0.5 --perms 128 --bands 20 --rows 5
    """
    if plan_by not in PLAN_BY:
        raise ParameterError(f"--plan-by must be one of {', '.join(PLAN_BY)}; got {plan_by!r}")
    if events is not None and events < 1:
        raise ParameterError(f"--events must be at least 1; got {events}")
    if chart is not None:  # before the sample is read
        chart = output_file(chart, [sample] if sample else [], "plan --chart", "--chart")
    if report is not None:
        if report.suffix.lower() not in (".html", ".htm"):
            raise ParameterError(f"--report must end in .html; got {report.name!r}")
        report = output_file(report, [sample] if sample else [], "plan --report", "--report")
    budget = parse_size(memory) if memory else None
    runs = refine_sources(history or [])
    spec = EventSpec(entity=entity, element=element, on_null=on_null) if entity and element else None
    shape: dict = {}
    model = load_model().refine(runs)  # this machine's calibration (or the shipped default), refined by --history
    result = api.plan_banding(
        threshold, perms, recall, sample, spec, sample_size, entities, fp_weight, fn_weight, seed,
        bands=bands, rows=rows, max_candidates=max_candidates, plan_by=plan_by, scheme=scheme, events=events,
        top_k=top_k, model=model, shape=shape, history=runs, recall_of=recall_of,
    )
    summary = api.plan_summary(result, sample)
    summary["plan_by"] = plan_by
    summary["forecast"] = api.forecast_plan(result, shape, entities, events, budget, None, top_k, model, history=runs,
                                            max_candidates=max_candidates, curve=report is not None, refined=True)
    if chart is not None and result.bands is None:
        raise ParameterError("--chart draws the S-curve of a banding; at threshold 1.0 there is none")
    if chart is not None:
        write_chart(chart, result.bands, result.rows, threshold, result.histogram)
        summary["chart"] = str(chart)
    if report is not None:
        from lshjob.report.forecast_page import write_plan_page

        summary["report"] = str(write_plan_page(result, summary, report, summary["forecast"].get("curve")))
    text = plan_report(summary) + "\n\n" + forecast_report(summary["forecast"])
    if report is not None:
        text += f"\n\nreport: {report}"
    _emit(summary, as_json, quiet, text)


def calibrate(
    out: Annotated[Path | None, typer.Option(
        help="Model file to write.  [default: $XDG_CACHE_HOME/lshjob/cost-model.json or ~/.cache/lshjob/...]")] = None,
    seconds: Annotated[float, typer.Option(help="Stop adding measured runs after this many seconds.")] = 40.0,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Fit the cost model behind lshjob plan's forecast to this machine: a few whole runs of
    generated sets (about 30-60 s), their seconds and peak memory per stage kept in the user
    cache folder. Without it, forecasts use the shipped default and say so.

    Example: lshjob calibrate

    Example (a model file of its own; LSHJOB_COST_MODEL=FILE makes lshjob plan use it):
    lshjob calibrate --out /opt/lshjob/cost-model.json
    """
    if out is not None:
        out = output_file(out, [], "calibrate", "--out")
    said = [] if (quiet or as_json) else None
    summary = calibrate_model(out, seconds, progress=(lambda line: typer.echo(line, err=True)) if said is None
                              else None)
    text = (f"calibrated from {len(summary['runs'])} runs in {summary['seconds']} s -> {summary['path']}\n"
            f"{summary['provenance']}")
    _emit(summary, as_json, quiet, text)
