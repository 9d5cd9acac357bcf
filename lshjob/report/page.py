"""The index report: one self-contained HTML file (figures inline as SVG, no script, no
reference to anything outside the file), built from :class:`lshjob.jobs.report.ReportData` with
the Jinja2 template ``templates/index.html.j2`` and every value escaped.

Sections (their ids): ``s-curve`` (the plan's S-curve, threshold and sample histogram; the
points drawn in ``data-s`` and ``data-p``), ``recall`` (predicted beside measured), ``stages``
(seconds and peak memory per stage against the budget), ``skew`` (bucket sizes and what skew
handling did), ``neighbours`` (candidates and neighbours per entity, Jaccard of the rows),
``forecast`` (time, memory and disk against N, the run a point), ``history`` (a store's refreshes).
"""

from __future__ import annotations

from html import escape
from pathlib import Path

import numpy as np

from lshjob.core.atomic import atomic_file
from lshjob.errors import ParameterError
from lshjob.jobs.report import ReportData
from lshjob.report import figures
from lshjob.report.forecast_page import forecast_section, history_section
from lshjob.report.html_parts import figure as _figure
from lshjob.report.html_parts import size as _bytes
from lshjob.report.html_parts import table as _table
from lshjob.report.templating import markup, render

SECTIONS = ("s-curve", "recall", "stages", "skew", "neighbours", "forecast", "history")

def build_page(data: ReportData) -> str:
    """The report's HTML text (template ``templates/index.html.j2``)."""
    m = data.manifest
    threshold = m.options["threshold"]
    return render(
        "index.html.j2",
        title=str(data.index), run_id=m.run_id, started_at=m.started_at,
        finished_at=m.finished_at, host=m.host, entities=m.counts.get("entities", "?"),
        rows=m.output.get("rows", "?"), threshold=threshold, top_k=m.options["top_k"],
        notes=data.notes, plan_text=_plan_text(m.plan), s_curve=markup(_s_curve(data)),
        recall=markup(_recall(data)), budget=_bytes(m.memory_budget_bytes), total_seconds=m.seconds["total"],
        stages=markup(_stages(data)), skew=markup(_skew(m.skew, m.counts.get("oversize_buckets_compared"))),
        neighbours=markup(_neighbours(data)),
        forecast=markup(forecast_section(data.forecast, m.memory_budget_bytes)),
        history=markup(history_section(data.history)),
    )


def write_page(data: ReportData, out: str | Path) -> Path:
    """Write the page to ``out`` (a temporary name, then renamed into place)."""
    out = Path(out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise ParameterError(f"--out must end in .html; got {out.name!r}")
    text = build_page(data)
    with atomic_file(out) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return out


def _plan_text(plan: dict) -> str:
    if not plan.get("bands"):
        return f"No bands ({plan.get('mode')}): {plan.get('why', '')}"
    return f"k={plan['perms']}, b={plan['bands']}, r={plan['rows']} ({plan['mode']} mode): {plan.get('why', '')}"


def _s_curve(data: ReportData) -> str:
    plan = data.manifest.plan
    if not plan.get("bands"):
        return "<p>No banded plan: every candidate is found exactly, there is no S-curve.</p>"
    svg, points = figures.s_curve(plan["bands"], plan["rows"], data.manifest.options["threshold"], data.histogram)
    return _figure("s-curve", svg, points, "P(candidate) = 1-(1-s^r)^b (Mining of Massive Datasets, 3.4)"
                   + ("; bars: the sample's pair similarities" if data.histogram is not None else ""))


def _recall(data: ReportData) -> str:
    predicted = (data.manifest.plan.get("predicted") or {}).get("expected_recall")
    rows = [("predicted by the plan (sample histogram through the S-curve)", _fraction(predicted))]
    audit = data.audit
    if audit is None:
        rows.append(("measured by lshjob audit", "no audit given"))
    elif not audit.get("audited"):
        rows.append(("measured by lshjob audit", "not measured: " + "; ".join(audit.get("failed", []))))
    else:
        rows += [
            (f"measured by lshjob audit on {audit['sampled_entities']} sampled entities", _fraction(audit["recall"])),
            ("predicted for the same neighbours by the S-curve", _fraction(audit["predicted_recall"])),
            ("true neighbours expected in the index / found",
             f"{audit.get('expected_in_index', '?')} / {audit.get('found', '?')}"),
            ("published pairs with a wrong Jaccard", str(audit.get("wrong_pairs", "?"))),
        ]
    return _table(("", "recall"), rows, "recall-table")


def _stages(data: ReportData) -> str:
    m = data.manifest
    seconds = {k: v for k, v in m.seconds.items() if isinstance(v, int | float)}  # a refresh's own are a dict
    svg, names = figures.stages(seconds, m.peak_memory_bytes, m.memory_budget_bytes)
    rows = [(n, f"{seconds[n]}", _bytes(m.peak_memory_bytes.get(n)),
             _fraction(m.peak_memory_bytes[n] / m.memory_budget_bytes if n in m.peak_memory_bytes else None))
            for n in names]
    return (_figure("stages", svg, None, "left: seconds per stage; right: peak memory, the dashed line the budget")
            + _table(("stage", "seconds", "peak memory", "of budget"), rows, "stage-table"))


def _skew(skew: dict | None, compared: int | None = None) -> str:
    """The skew report; ``compared``: the buckets over the limit verification compared whole
    (held in reserve, :mod:`lshjob.index.verify._reserve`)."""
    if not skew:
        return "<p>No bands, no buckets: the run compared sets exactly.</p>"
    said = (f"{skew.get('buckets', 0)} buckets, {skew.get('buckets_with_pairs', 0)} of them holding two or more "
            f"rows; the largest holds {skew.get('largest_bucket', 0)} rows (limit --max-bucket "
            f"{skew.get('max_bucket', '?')}). ")
    if skew.get("oversize_buckets"):
        said += (f"{skew['oversize_buckets']} bucket(s) over the limit ({skew.get('oversize_rows', 0)} rows, "
                 f"{skew.get('oversize_pairs', 0)} pairs) were split into {skew.get('oversize_sub_buckets', 0)} "
                 f"sub-buckets ({skew.get('split_pairs', 0)} pairs kept, {skew.get('skipped_pairs', 0)} skipped).")
        if compared:
            said += (f" Verification compared {compared} of them whole, judged by a sample of their members: "
                     "their pairs, counted as skipped here, were compared.")
    else:
        said += "No bucket was over the limit: skew handling did nothing."
    rows = [(key, str(value)) for key, value in sorted(skew.items())]
    return f"<p>{escape(said)}</p>\n" + _table(("entry", "value"), rows, "skew-table")


def _neighbours(data: ReportData) -> str:
    m = data.manifest
    entities = max(1, int(m.counts.get("entities", 1)))
    predicted = (m.plan.get("predicted") or {}).get("candidates_per_entity")
    per = data.neighbours_per_entity
    rows = [
        ("candidate pairs", str(m.counts.get("candidate_pairs", "?"))),
        ("candidates per entity, measured (2 x pairs / entities)",
         f"{2 * m.counts.get('candidate_pairs', 0) / entities:.3f}"),
        ("candidates per entity, predicted by the plan", f"{predicted:.3f}" if predicted is not None else "-"),
        ("verified pairs", str(m.counts.get("verified_pairs", "?"))),
        ("neighbour rows published", str(int(per.sum()))),
        ("entities with no neighbour", str(int((per == 0).sum()))),
        ("neighbours per entity: median / mean / max",
         f"{np.median(per):g} / {per.mean():.3f} / {per.max()}" if per.size else "-"),
        ("Jaccard of published rows: min / median",
         f"{data.jaccard.min():.3f} / {np.median(data.jaccard):.3f}" if data.jaccard.size else "-"),
    ]
    svg = figures.distributions(per, data.jaccard, m.options["threshold"])
    return (_figure("distributions", svg, None, "left: neighbours per entity; right: Jaccard of the published rows")
            + _table(("", "value"), rows, "neighbour-table"))


def _fraction(value) -> str:
    return "-" if value is None else f"{value:.4f}"
