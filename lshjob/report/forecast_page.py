"""The forecast on the pages: the index report's ``forecast`` and ``history`` sections, and the
page of ``lshjob plan --report`` (template ``templates/plan.html.j2``): the S-curve over the
sample's histogram, the forecast per stage against the budget, the runners-up with their
predicted seconds, and the curves against N. Self-contained as the index report is.
"""

from __future__ import annotations

from pathlib import Path

from lshjob.core.atomic import atomic_file
from lshjob.report import figures, forecast_figures
from lshjob.report.html_parts import figure, size, table
from lshjob.report.templating import markup, render

CURVE_CAPTION = ("forecast by the cost model (lshjob calibrate, or the shipped default) at other sizes, the same "
                 "shape; candidate and verified pairs grow with N^2 as the planner scales them; dots: measured")


def forecast_section(forecast: dict | None, budget: int) -> str:
    """Curves against N with the measured run as a point, and forecast beside measured per stage."""
    if not forecast:
        return ("<p>No forecast: the run has no banded plan (identical sets only), or the index was updated by a "
                "refresh from the store's state, whose counts are not a whole run's (see the notes).</p>")
    svg, points = forecast_figures.curves(forecast["curve"], forecast.get("point"), budget)
    rows = [(s, f"{forecast['seconds'][s]:.2f}", f"{forecast['measured_seconds'].get(s, 0):.2f}",
             size(forecast["peak_by_stage"][s]), size(forecast["measured_peak"].get(s)))
            for s in forecast["peak_by_stage"]]
    rows.append(("total", f"{forecast['seconds']['total']:.2f}", f"{forecast['measured_seconds']['total']:.2f}",
                 size(forecast["peak"]), size(max(forecast["measured_peak"].values(), default=0))))
    coeff = forecast["coefficients"]
    said = (f"Coefficients: {coeff['source']} ({coeff['provenance']}), not refined by this run: the dots show "
            f"how far it is from the model (a first run also compiles its kernels).")
    return (figure("forecast", svg, points, CURVE_CAPTION) + f"<p>{_esc(said)}</p>\n"
            + table(("stage", "forecast s", "measured s", "forecast peak", "measured peak"), rows, "forecast-table"))


def history_section(runs: list[dict] | None) -> str:
    """A store's refreshes: seconds, peak memory and entities, oldest first."""
    if not runs:
        return "<p>No store given (lshjob report INDEX --store STORE): no history.</p>"
    rows = [(r.get("run_id", "?"), r.get("started_at", "?"), r.get("entities", "?"), f"{r.get('seconds') or 0:.2f}",
             size(max((r.get("peak_memory_bytes") or {0: 0}).values())), r.get("published_rows", "?"))
            for r in runs]
    return (figure("history", forecast_figures.history(runs), None,
                   "each refresh of the store, oldest first: seconds, largest per-stage peak memory, entities")
            + table(("run", "started", "entities", "seconds", "peak memory", "published rows"), rows,
                    "history-table"))


def write_plan_page(plan, summary: dict, out: str | Path, curve: list[dict] | None = None) -> Path:
    """The page of ``lshjob plan --report``: ``plan`` (:class:`lshjob.plan.choose.Plan`),
    ``summary`` (what ``lshjob plan --json`` prints, its ``forecast`` included), ``curve``
    (:func:`lshjob.plan.forecast.forecast_curve`), written atomically to ``out``."""
    out = Path(out)
    fc = summary.get("forecast") or {}
    notes = [] if fc.get("available") else [f"no forecast: {fc.get('why', '')}"]
    if plan.bands:
        svg, points = figures.s_curve(plan.bands, plan.rows, plan.threshold, plan.histogram)
        s_curve = figure("s-curve", svg, points, "P(candidate) = 1-(1-s^r)^b (Mining of Massive Datasets, 3.4)"
                         + ("; bars: the sample's pair similarities" if plan.histogram is not None else ""))
    else:
        s_curve = "<p>No banded plan: only identical sets pair, grouped exactly.</p>"
    stages = forecast_text = runners = curves = ""
    if fc.get("available"):
        per = {s: v for s, v in fc["seconds"].items() if s != "total"}
        stages = figure("stages", forecast_figures.stage_forecast(per, fc["peak_memory_by_stage"],
                                                                  fc["memory_budget_bytes"]), None,
                        "left: forecast seconds per stage; right: forecast peak memory, the dashed line the budget")
        stages += table(("stage", "seconds", "peak memory"),
                        [(s, f"{v:.2f}", size(fc["peak_memory_by_stage"][s])) for s, v in per.items()]
                        + [("total", f"{fc['seconds']['total']:.2f}", size(fc["peak_memory_bytes"]))], "stage-table")
        c = fc["counts"]
        forecast_text = (f"At {c['entities']:,} entities and {c['events']:,} events: {fc['seconds']['total']:.1f} s, "
                         f"peak {size(fc['peak_memory_bytes'])} of a {size(fc['memory_budget_bytes'])} budget "
                         f"({'in parts' if fc['in_parts'] else 'one part'}), disk up to "
                         f"{size(fc['disk_bytes']['total'])}. Coefficients: {fc['coefficients']['source']} "
                         f"({fc['coefficients']['provenance']}).")
        runners = table(("k, b, r", "expected recall", "expected candidates", "forecast seconds"),
                        [(f"{plan.perms}, {plan.bands}, {plan.rows} (chosen)",
                          f"{plan.predicted.get('expected_recall', 0):.4f}",
                          f"{plan.predicted.get('expected_candidates', 0):.4g}", f"{fc['seconds']['total']:.2f}")]
                        + [(f"{r['perms']}, {r['bands']}, {r['rows']}", f"{r['expected_recall']:.4f}",
                            f"{r['expected_candidates']:.4g}", f"{r['seconds']:.2f}") for r in fc["runners_up"]],
                        "runners-table")
        notes += fc.get("warnings", []) + fc.get("notes", [])
        if curve:
            svg, points = forecast_figures.curves(curve, None, fc["memory_budget_bytes"])
            curves = figure("forecast", svg, points, CURVE_CAPTION.replace("; dots: measured", ""))
    text = render("plan.html.j2", threshold=plan.threshold, notes=notes, plan_text=plan.why,
                  s_curve=markup(s_curve), forecast_text=forecast_text, stages=markup(stages),
                  runners_up=markup(runners), forecast=markup(curves))
    with atomic_file(out) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return out


def _esc(text: str) -> str:
    from html import escape

    return escape(text)
