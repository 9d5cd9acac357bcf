"""Readable text for the terminal: plan tables and run summaries."""

from __future__ import annotations

from lshjob.report.charts import text_s_curve


def _fmt(x: float) -> str:
    if x >= 1e6:
        return f"{x:,.3g}".replace("e+0", "e").replace("e+", "e")
    return f"{x:,.1f}" if x < 100 else f"{x:,.0f}"


def plan_report(summary: dict) -> str:
    """The chosen plan, runners-up and the S-curve, as plain text (from
    :func:`lshjob.jobs.plan.plan_summary`)."""
    t, chosen = summary["threshold"], summary["chosen"]
    if summary["mode"] == "identical-only":
        return f"identical-only mode: {chosen['why']}"
    lines = [f"{summary['mode']} mode, threshold {t}: k={summary['perms']}, b={summary['bands']}, r={summary['rows']} "
             f"(approximate threshold {chosen['approximate_threshold']:.3f})", ""]
    if chosen.get("meets_target") is False:
        lines[0] += f"; does NOT reach the recall target {summary['sample']['recall_target']}"
    rows = [chosen, *summary["runners_up"]]
    if summary["sample"] is None:  # theory mode: areas under the S-curve
        header = f"{'':2}{'k':>5}{'b':>5}{'r':>4}{'FP area':>11}{'FN area':>11}{'weighted':>11}{'P(t)':>8}"
        lines.append(header)
        for i, p in enumerate(rows):
            mark = "> " if i == 0 else "  "
            lines.append(
                f"{mark}{p['perms']:>5}{p['bands']:>5}{p['rows']:>4}{p['false_positive_area']:>11.5f}"
                f"{p['false_negative_area']:>11.5f}{p['weighted_error']:>11.5f}{p['probability_at_threshold']:>8.3f}"
            )
    else:
        s = summary["sample"]
        lines.append(
            f"sample: {s['sampled_entities']} of {s['total_entities']} entities from {s['path']} "
            f"({s['similarity']}); {s['sampled_pairs']:,} pairs, "
            f"{s['sampled_pairs_at_or_above_threshold']:,} at or above {t} and "
            f"{s['sampled_identical_pairs']:,} of identical sets (found by collapsing, not banding)"
        )
        lines.append("")
        lists = chosen.get("expected_list_recall") is not None  # --recall-of lists: the target's column
        lines.append(
            f"{'':2}{'k':>5}{'b':>5}{'r':>4}{'recall':>8}" + (f"{'lists':>8}{'bound':>8}" if lists else "")
            + f"{'candidates':>13}{'per entity':>12}{'verified':>12}{'false cand.':>13}{'bucket rows':>13}"
        )
        for i, p in enumerate(rows):
            mark = "> " if i == 0 else "  "
            lines.append(
                f"{mark}{p['perms']:>5}{p['bands']:>5}{p['rows']:>4}{p['expected_recall']:>8.3f}"
                + (f"{p.get('expected_list_recall') or 0:>8.3f}{p.get('list_recall_low') or 0:>8.3f}" if lists
                   else "") +
                f"{_fmt(p['expected_candidates']):>13}{_fmt(p['candidates_per_entity']):>12}"
                f"{_fmt(p['expected_verified']):>12}{_fmt(p['expected_false_candidates']):>13}"
                f"{p['bucket_rows']:>13,}"
            )
        for note in chosen.get("notes", []):
            lines.append(f"note: {note}")
    lines += ["", text_s_curve(summary["bands"], summary["rows"], t)]
    return "\n".join(lines)


def _mib(n: int) -> str:
    return f"{n / 2**20:,.0f} MiB"


def run_report(m: dict) -> str:
    """Summary of a run: plan, counts per stage, skew handling, time and memory."""
    plan, c = m["plan"], m["counts"]
    lines = [f"index -> {m['out']} ({m['output']['rows']:,} neighbour rows)"]
    if plan["mode"] == "identical-only":
        lines.append(f"plan: {plan['why']}")
    else:
        p = plan["predicted"]
        head = f"plan ({plan['mode']}): k={plan['perms']}, b={plan['bands']}, r={plan['rows']}; "
        if "expected_recall" not in p:  # theory mode: no sample, only the S-curve
            lines.append(head + f"chance of a pair at the threshold {p['probability_at_threshold']:.3f}")
        else:
            lines.append(
                head + f"predicted recall {p['expected_recall']:.3f}"
                + ("" if p.get("expected_list_recall") is None else
                   f" (of the top-{m['top_k_effective']} lists: {p['expected_list_recall']:.3f}"
                   + ("" if p.get("list_recall_low") is None else f", lower bound {p['list_recall_low']:.3f}")
                   + ")")
                + f", {p['expected_candidates']:,.0f} candidate pairs"
            )
    lines.append(
        f"entities {c['entities']:,} ({c['representatives']:,} after collapsing identical sets), "
        f"events {c['events']:,}"
        + (f"; read in {c['parts']} parts (key ranges, one at a time; memory budget "
           f"{m['memory_budget_bytes'] / 2**30:.1f} GiB)" if c.get("parts", 1) > 1 else "")
    )
    lines.append(
        f"bucket rows {c['bucket_rows']:,} -> candidates {c['candidate_pairs']:,} -> verified "
        f"{c['verified_pairs']:,} -> published {c['published_rows']:,}"
    )
    versions = m.get("versions") or {}
    if "spark" in versions:  # the whole run, or some of band, join and verify, ran on Spark
        if (m.get("options") or {}).get("engine") == "spark":
            on_spark = "the whole run (the plan's sample on the driver)"
        else:
            on_spark = ", ".join(s for s, name in (m.get("engines") or {}).items() if name == "spark")
        lines.append(f"on Spark {versions['spark']} ({versions.get('spark_master')}): {on_spark}")
    skew = m.get("skew")
    if skew:
        text = f"skew: largest bucket {skew['largest_bucket']:,}"
        if skew["oversize_buckets"]:
            text += (
                f"; {skew['oversize_buckets']:,} bucket(s) over --max-bucket {skew['max_bucket']:,} split by the "
                f"next band ({skew['split_pairs']:,} of {skew['oversize_pairs']:,} potential pairs kept, "
                f"{skew['skipped_pairs']:,} left out)"
            )
            compared = (m.get("counts") or {}).get("oversize_buckets_compared")
            if compared:  # buckets held in reserve (lshjob.index.verify._reserve)
                text += f"; verification compared {compared:,} of them whole, judged by a sample of their members"
        else:
            text += f", within --max-bucket {skew['max_bucket']:,}"
        lines.append(text)
        if skew["skipped_pairs"]:
            lines.append(
                "warning: pairs that meet only in skipped buckets are not found, so recall can fall below "
                "the prediction; check with lshjob audit, and raise --max-bucket or use more rows per band"
            )
    lines.append("stage      seconds   peak memory")
    for stage, secs in m["seconds"].items():
        if stage == "total":
            continue
        peak = m["peak_memory_bytes"].get(stage)
        lines.append(f"{stage:<10}{secs:>8.2f}   {_mib(peak) if peak else '':>11}")
    lines.append(f"{'total':<10}{m['seconds']['total']:>8.2f}")
    return "\n".join(lines)


def audit_report(r: dict) -> str:
    """What an audit measured, as plain text."""
    if not r.get("audited", True):
        return f"audit of {r['index']} stopped before measuring"
    rec = "n/a" if r["recall"] is None else f"{r['recall']:.4f}"
    pred = "n/a" if r["predicted_recall"] is None else f"{r['predicted_recall']:.4f}"
    lines = [
        f"audit of {r['index']}: {r['sampled_entities']} sampled entities against {r['compared_against']}",
        f"true pairs at or above {r['threshold']}: {r['true_pairs']:,}; true top-{r['top_k']} places "
        f"{r['expected_in_index']:,}, filled by published neighbours {r['found']:,}"
        + (f" ({r['entities_tied_at_top_k']:,} entities with neighbours tied at the cut)"
           if r.get("entities_tied_at_top_k") else ""),
        f"recall {rec} (S-curve predicts {pred})"
        + ("" if r.get("min_recall") is None else f"; --min-recall {r['min_recall']}"),
    ]
    if r.get("distinct_recall") is not None:
        lines.append(
            f"over {r['distinct_set_pairs']:,} distinct pairs of different sets: recall {r['distinct_recall']:.4f}, "
            f"S-curve predicts {r['distinct_predicted']:.4f} +/- {r['distinct_se']:.4f} (one s.e.)"
        )
    lines += [
        f"published pairs checked {r['published_pairs_checked']:,}; wrong {r['wrong_pairs']}",
    ]
    for entity, neighbour, stored, exact in r["wrong_examples"]:
        lines.append(f"  wrong: {entity} and {neighbour}: stored Jaccard {stored:.4f}, exact {exact:.4f}")
    return "\n".join(lines)  # warnings and failed checks: on stderr (lshjob audit)


def forecast_report(forecast: dict) -> str:
    """The forecast of ``lshjob plan`` as a table: seconds and peak memory per stage, disk,
    parts, where the coefficients come from, and the runners-up's predicted seconds."""
    if not forecast.get("available"):
        return f"forecast: none ({forecast.get('why', '')})"
    c = forecast["counts"]
    lines = [f"forecast at {_fmt(c['entities'])} entities, {_fmt(c['events'])} events "
             f"({_fmt(c['candidate_pairs'])} candidate pairs, {_fmt(c['verified_pairs'])} verified):",
             f"{'stage':<10}{'seconds':>10}{'peak memory':>14}"]
    for stage, seconds in forecast["seconds"].items():
        if stage != "total":
            lines.append(f"{stage:<10}{seconds:>10.2f}{_size(forecast['peak_memory_by_stage'][stage]):>14}")
    lines.append(f"{'total':<10}{forecast['seconds']['total']:>10.2f}{_size(forecast['peak_memory_bytes']):>14}")
    disk = forecast["disk_bytes"]
    lines.append(f"disk: work folder up to {_size(disk['work'])}, index {_size(disk['output'])}; "
                 f"memory budget {_size(forecast['memory_budget_bytes'])}: "
                 + ("in parts (key ranges)" if forecast["in_parts"] else "one part"))
    coeff = forecast["coefficients"]
    said = "this machine's calibration" if coeff["source"] == "calibrated" else \
        "the shipped default (run lshjob calibrate to fit this machine)"
    scaling = forecast.get("scaling")
    if scaling:
        cpu = forecast.get("cpu_seconds", {}).get("total")
        lines.append(f"seconds and memory {forecast['method']} ({', '.join(_fmt(n) for n in scaling['sample_runs'])} "
                     f"entities), counts projected from the sample's buckets: {_fmt(scaling['representatives'])} "
                     f"distinct sets, {_fmt(scaling['pair_rows_kept'])} pair rows within --max-bucket"
                     + (f"; CPU seconds {cpu:.1f}" if cpu else ""))
        lines.append(f"coefficients (runners-up): {said}")
    else:
        lines.append(f"coefficients: {said}: {coeff['provenance']}")
    if coeff["refined_from"] and not scaling:
        lines.append(f"refined from {len(coeff['refined_from'])} run(s): {', '.join(coeff['refined_from'])}")
    if coeff.get("not_refined_from"):
        lines.append("not refined from (under 100,000 events, or no bands): " + ", ".join(coeff["not_refined_from"]))
    if forecast["runners_up"]:
        lines += ["", f"{'':2}{'k':>5}{'b':>5}{'r':>4}{'recall':>8}{'candidates':>13}{'seconds':>10}"]
        for r in forecast["runners_up"]:
            lines.append(f"{'':2}{r['perms']:>5}{r['bands']:>5}{r['rows']:>4}{r['expected_recall']:>8.3f}"
                         f"{_fmt(r['expected_candidates']):>13}{r['seconds']:>10.2f}")
    lines += [f"note: {n}" for n in forecast["notes"]] + [f"warning: {w}" for w in forecast["warnings"]]
    return "\n".join(lines)


def _size(value: float) -> str:
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if value >= size:
            return f"{value / size:.1f} {unit}"
    return f"{int(value)} B"
