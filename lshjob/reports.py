"""Readable text for the terminal: plan tables and run summaries."""

from __future__ import annotations

from .charts import text_s_curve


def _fmt(x: float) -> str:
    if x >= 1e6:
        return f"{x:,.3g}".replace("e+0", "e").replace("e+", "e")
    return f"{x:,.1f}" if x < 100 else f"{x:,.0f}"


def plan_report(result) -> str:
    """The chosen plan, runners-up and the S-curve, as plain text."""
    t = result.threshold
    lines = [f"{result.mode} mode, threshold {t}: k={result.perms}, b={result.bands}, r={result.rows} "
             f"(approximate threshold {result.chosen['approximate_threshold']:.3f})", ""]
    rows = [result.chosen, *result.runners_up]
    if result.mode == "theory":
        header = f"{'':2}{'k':>5}{'b':>5}{'r':>4}{'FP area':>11}{'FN area':>11}{'weighted':>11}{'P(t)':>8}"
        lines.append(header)
        for i, p in enumerate(rows):
            mark = "> " if i == 0 else "  "
            lines.append(
                f"{mark}{p['perms']:>5}{p['bands']:>5}{p['rows']:>4}{p['false_positive_area']:>11.5f}"
                f"{p['false_negative_area']:>11.5f}{p['weighted_error']:>11.5f}{p['probability_at_threshold']:>8.3f}"
            )
    else:
        s = result.sample
        lines.append(
            f"sample: {s['sampled_entities']} of {s['total_entities']} entities from {s['path']} "
            f"({s['similarity']}); {s['sampled_pairs']:,} pairs, "
            f"{s['sampled_pairs_at_or_above_threshold']:,} at or above {t} and "
            f"{s['sampled_identical_pairs']:,} of identical sets (found by collapsing, not banding)"
        )
        lines.append("")
        lines.append(
            f"{'':2}{'k':>5}{'b':>5}{'r':>4}{'recall':>8}{'candidates':>13}{'per entity':>12}"
            f"{'verified':>12}{'false cand.':>13}{'bucket rows':>13}"
        )
        for i, p in enumerate(rows):
            mark = "> " if i == 0 else "  "
            lines.append(
                f"{mark}{p['perms']:>5}{p['bands']:>5}{p['rows']:>4}{p['expected_recall']:>8.3f}"
                f"{_fmt(p['expected_candidates']):>13}{_fmt(p['candidates_per_entity']):>12}"
                f"{_fmt(p['expected_verified']):>12}{_fmt(p['expected_false_candidates']):>13}"
                f"{p['bucket_rows']:>13,}"
            )
        for note in result.chosen.get("notes", []):
            lines.append(f"note: {note}")
    lines += ["", text_s_curve(result.bands, result.rows, t)]
    return "\n".join(lines)
