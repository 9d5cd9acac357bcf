"""The index report: one self-contained HTML file (figures inline as SVG, no script, no
reference to anything outside the file), built from :class:`lshjob.jobs.report.ReportData` with
``string.Template`` and every value escaped.

Sections (their ids): ``s-curve`` (the plan's S-curve, threshold and sample histogram; the
points drawn in ``data-s`` and ``data-p``), ``recall`` (predicted beside measured), ``stages``
(seconds and peak memory per stage against the budget), ``skew`` (bucket sizes and what skew
handling did), ``neighbours`` (candidates and neighbours per entity, Jaccard of the rows).
"""

from __future__ import annotations

import json
from html import escape
from pathlib import Path
from string import Template

import numpy as np

from lshjob.core.atomic import atomic_file
from lshjob.errors import ParameterError
from lshjob.jobs.report import ReportData
from lshjob.report import figures

SECTIONS = ("s-curve", "recall", "stages", "skew", "neighbours")

PAGE = Template("""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>lshjob index report: $title</title>
<style>
body { font-family: sans-serif; margin: 2em auto; max-width: 60em; color: #222; background: #fff; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; border-bottom: 1px solid #ccc; margin-top: 2em; }
table { border-collapse: collapse; margin: 0.5em 0; }
td, th { border: 1px solid #ccc; padding: 0.2em 0.6em; text-align: right; }
th { background: #eef2f8; } td.name, th.name { text-align: left; }
figure { margin: 0.5em 0; } figure svg { max-width: 100%; height: auto; }
.note { color: #7a4b00; }
</style>
</head>
<body>
<h1>Index report: $title</h1>
<p>Run $run_id, $started_at to $finished_at on $host; $entities entities, $rows neighbour rows,
threshold $threshold, top-k $top_k.</p>
$notes
<section id="s-curve">
<h2>S-curve of the plan</h2>
<p>$plan_text</p>
$s_curve
</section>
<section id="recall">
<h2>Recall: predicted and measured</h2>
$recall
</section>
<section id="stages">
<h2>Seconds and peak memory per stage</h2>
<p>Memory budget $budget; total $total_seconds s.</p>
$stages
</section>
<section id="skew">
<h2>Buckets and skew handling</h2>
$skew
</section>
<section id="neighbours">
<h2>Candidates and neighbours per entity</h2>
$neighbours
</section>
</body>
</html>
""")


def build_page(data: ReportData) -> str:
    """The report's HTML text."""
    m = data.manifest
    threshold = m.options["threshold"]
    return PAGE.substitute(
        title=escape(str(data.index)), run_id=escape(m.run_id), started_at=escape(m.started_at),
        finished_at=escape(m.finished_at), host=escape(m.host), entities=m.counts.get("entities", "?"),
        rows=m.output.get("rows", "?"), threshold=threshold, top_k=m.options["top_k"],
        notes="".join(f'<p class="note">{escape(n)}</p>\n' for n in data.notes),
        plan_text=escape(_plan_text(m.plan)), s_curve=_s_curve(data), recall=_recall(data),
        budget=_bytes(m.memory_budget_bytes), total_seconds=m.seconds["total"], stages=_stages(data),
        skew=_skew(m.skew), neighbours=_neighbours(data),
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
    svg, names = figures.stages(m.seconds, m.peak_memory_bytes, m.memory_budget_bytes)
    rows = [(n, f"{m.seconds[n]}", _bytes(m.peak_memory_bytes.get(n)),
             _fraction(m.peak_memory_bytes[n] / m.memory_budget_bytes if n in m.peak_memory_bytes else None))
            for n in names]
    return (_figure("stages", svg, None, "left: seconds per stage; right: peak memory, the dashed line the budget")
            + _table(("stage", "seconds", "peak memory", "of budget"), rows, "stage-table"))


def _skew(skew: dict | None) -> str:
    if not skew:
        return "<p>No bands, no buckets: the run compared sets exactly.</p>"
    said = (f"{skew.get('buckets', 0)} buckets, {skew.get('buckets_with_pairs', 0)} of them holding two or more "
            f"rows; the largest holds {skew.get('largest_bucket', 0)} rows (limit --max-bucket "
            f"{skew.get('max_bucket', '?')}). ")
    if skew.get("oversize_buckets"):
        said += (f"{skew['oversize_buckets']} bucket(s) over the limit ({skew.get('oversize_rows', 0)} rows, "
                 f"{skew.get('oversize_pairs', 0)} pairs) were split into {skew.get('oversize_sub_buckets', 0)} "
                 f"sub-buckets ({skew.get('split_pairs', 0)} pairs kept, {skew.get('skipped_pairs', 0)} skipped).")
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


def _figure(name: str, svg: str, points: dict | None, caption: str) -> str:
    data = "".join(f" data-{key}=\"{escape(json.dumps(values))}\"" for key, values in (points or {}).items())
    return (f'<figure class="figure" id="figure-{name}"{data}>\n{figures.svg_ids_free(svg, name + "-")}\n'
            f"<figcaption>{escape(caption)}</figcaption>\n</figure>\n")


def _table(head: tuple, rows: list[tuple], table_id: str) -> str:
    cells = "".join(f'<th class="name">{escape(h)}</th>' if i == 0 else f"<th>{escape(h)}</th>"
                    for i, h in enumerate(head))
    body = "".join("<tr>" + "".join(f'<td class="name">{escape(str(v))}</td>' if i == 0 else
                                    f"<td>{escape(str(v))}</td>" for i, v in enumerate(row)) + "</tr>\n"
                   for row in rows)
    return f'<table id="{table_id}">\n<tr>{cells}</tr>\n{body}</table>\n'


def _fraction(value) -> str:
    return "-" if value is None else f"{value:.4f}"


def _bytes(value) -> str:
    if value is None:
        return "-"
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if value >= size:
            return f"{value / size:.1f} {unit}"
    return f"{value} B"
