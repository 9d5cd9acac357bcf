"""The drift view: one self-contained HTML file (figures inline as base64 PNG, no network).

Shows the distribution of the containment and the similarity per period (box plots, the
flagged rows as points over them), the population's medians and typical containment, the
timelines of a few flagged entities (the most extreme scores) with their neighbour-list change
when ``--neighbours`` was given, the entities whose neighbour lists changed most, and, with
``--store``, the elements that entered and left each checked flagged set with its exact
similarity and containment.
"""

from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import polars as pl

from lshjob.core.atomic import atomic_file
from lshjob.errors import ParameterError

TIMELINES = 6  # flagged entities drawn


def require_matplotlib() -> None:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise ParameterError("--html needs matplotlib (pip install 'lshjob[charts]')") from None


def _png(fig) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=90, bbox_inches="tight")
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _distributions(rows: pl.DataFrame, plt) -> str:
    compared = rows.filter(pl.col("containment").is_not_null())
    periods = compared["period"].unique().sort().to_list()
    fig, axes = plt.subplots(2, 1, figsize=(max(6.0, 0.7 * len(periods) + 2), 7), sharex=True)
    for ax, column in zip(axes, ("containment", "similarity")):
        data = [compared.filter(pl.col("period") == p)[column].to_numpy() for p in periods]
        ax.boxplot(data, positions=range(len(periods)), widths=0.6, showfliers=False)
        for i, p in enumerate(periods):
            flagged = compared.filter((pl.col("period") == p) & pl.col("flagged"))[column].to_numpy()
            ax.scatter([i] * len(flagged), flagged, s=8, color="tab:red", alpha=0.6,
                       label="flagged" if i == 0 else None)
        ax.set_ylabel(column)
        ax.set_ylim(-0.03, 1.03)
    axes[0].set_title("Per period: entities' containment in their history and similarity to the previous period")
    axes[1].set_xticks(range(len(periods)), [str(p) for p in periods], rotation=45, ha="right")
    axes[0].legend(loc="lower left")
    image = _png(fig)
    plt.close(fig)
    return image


def _timelines(rows: pl.DataFrame, plt, keys: list[str]) -> tuple[str | None, list[dict]]:
    top = (rows.filter("flagged").sort("score", descending=True)
           .unique(subset=keys, keep="first", maintain_order=True).head(TIMELINES))
    if top.height == 0:
        return None, []
    fig, axes = plt.subplots(top.height, 1, figsize=(8, 1.9 * top.height), squeeze=False)
    for ax, entity in zip(axes[:, 0], top.iter_rows(named=True)):
        cond = pl.lit(True)
        for k in keys:
            cond = cond & (pl.col(k) == entity[k])
        line = rows.filter(cond).sort("period")
        x = line["period"].to_list()
        ax.plot(x, line["containment"].to_list(), marker="o", label="containment")
        ax.plot(x, line["similarity"].to_list(), marker=".", linestyle="--", label="similarity")
        hit = line.filter("flagged")
        ax.scatter(hit["period"].to_list(), hit["containment"].to_list(), s=80, facecolors="none",
                   edgecolors="tab:red", label="flagged")
        ax.set_ylim(-0.03, 1.03)
        ax.set_title(", ".join(str(entity[k]) for k in keys), fontsize=9, loc="left")
        ax.tick_params(axis="x", labelsize=7)
    axes[0, 0].legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    image = _png(fig)
    plt.close(fig)
    extra = [c for c in ("list_change",) if c in top.columns]
    return image, top.select(*keys, "period", "score", "containment", "similarity", "set_size", *extra).to_dicts()


def _exact_part(ex: dict | None, esc, num) -> str:
    if not ex:
        return ("<p>The elements that entered and left a flagged entity's set: run with --store "
                "(a store written by lshjob refresh).</p>")
    listed = "".join(
        f"<tr><td>{esc(str(r['entity']))}</td><td>{esc(r['period'])}</td><td>{esc(r['compared_with'])}</td>"
        f"<td>{num(r['similarity'])}</td><td>{num(r['similarity_exact'])}</td>"
        f"<td>{num(r['containment'])}</td><td>{num(r['containment_exact'])}</td>"
        f"<td style='text-align:left'>{r['entered_count']}: {esc(', '.join(map(str, r['entered'])))}</td>"
        f"<td style='text-align:left'>{r['left_count']}: {esc(', '.join(map(str, r['left'])))}</td></tr>"
        for r in ex["rows"])
    return (f"<h2>Flagged sets in the store</h2><p>{ex['checked']:,} of {ex['flagged_rows']:,} flagged rows checked "
            f"against {esc(ex['store'])} (element {esc(str(ex['element']))}); estimates within "
            f"{esc(ex['error_bound'])}: similarity {ex['within_error']['similarity']:,}, containment "
            f"{ex['within_error']['containment']:,}. Entered and left: against the period compared with.</p>"
            "<table><tr><th>entity</th><th>period</th><th>compared with</th><th>similarity</th><th>exact</th>"
            f"<th>containment</th><th>exact</th><th>entered</th><th>left</th></tr>{listed}</table>")


def write_drift_html(rows: pl.DataFrame, summary: dict, path: str | Path) -> Path:
    """Write the view of ``lshjob drift``'s rows and summary to ``path`` (atomically)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    keys = [c for c in rows.columns if c in ("entity", "segment")]
    dist = _distributions(rows, plt)
    timeline, top = _timelines(rows, plt, keys)
    esc = html.escape
    def num(value) -> str:
        return "" if value is None else f"{value:.3f}"

    period_rows = "".join(
        f"<tr><td>{esc(p['period'])}</td><td>{p['compared']:,}</td><td>{p['flagged']:,}</td>"
        f"<td>{num(p['median_similarity'])}</td><td>{num(p['median_containment'])}</td>"
        f"<td>{num(p.get('typical_containment'))}</td></tr>"
        for p in summary["periods"])
    has_change = any("list_change" in r for r in top)
    top_rows = "".join(
        "<tr>" + "".join(f"<td>{esc(str(r[k]))}</td>" for k in keys)
        + f"<td>{r['period']}</td><td>{r['score']:.2f}</td><td>{r['containment']:.3f}</td>"
          f"<td>{r['similarity']:.3f}</td><td>{r['set_size']}</td>"
        + (f"<td>{num(r['list_change'])}</td>" if has_change else "") + "</tr>" for r in top)
    head = "".join(f"<th>{esc(k)}</th>" for k in keys)
    flagged_part = "<p>None flagged.</p>" if timeline is None else (
        f"<table><tr>{head}<th>period</th><th>score</th><th>containment</th><th>similarity</th>"
        f"<th>set size</th>{'<th>neighbour list change</th>' if has_change else ''}</tr>{top_rows}</table>"
        f'<img alt="timelines" src="data:image/png;base64,{timeline}">')
    neighbour_part = ""
    if summary.get("neighbour_drift"):
        nd = summary["neighbour_drift"]
        listed = "".join(f"<tr><td>{esc(str(r['entity']))}</td><td>{r['list_change']:.2f}</td>"
                         f"<td>{'yes' if r['flagged_latest'] else ''}</td>"
                         f"<td>{'yes' if r['flagged_any'] else ''}</td></tr>"
                         for r in nd["most_changed"])
        neighbour_part = (
            f"<h2>Neighbour drift</h2><p>{nd['entities_list_changed']:,} entities' neighbour lists changed "
            f"({esc(nd['source'])}); {nd['also_flagged_latest_period']:,} of them flagged in the latest period, "
            f"{nd['also_flagged_any_period']:,} in any.</p><table><tr><th>entity</th><th>list change</th>"
            f"<th>flagged (latest)</th><th>flagged (any)</th></tr>{listed}</table>")
    exact_part = _exact_part(summary.get("exact"), esc, num)
    body = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>lshjob drift: {esc(summary['signatures'])}</title>
<style>body{{font-family:sans-serif;max-width:70em;margin:1em auto}}table{{border-collapse:collapse}}
td,th{{border:1px solid #ccc;padding:2px 8px;text-align:right}}</style></head><body>
<h1>Drift of {esc(summary['signatures'])}</h1>
<p>{summary['rows_compared']:,} of {summary['rows']:,} entity-periods compared with their last
{summary['history']} period(s); {summary['flagged']:,} flagged \
({summary['entities_flagged']:,} entities), z &gt; {summary['z']}.</p>
<h2>Per period</h2>
<table><tr><th>period</th><th>compared</th><th>flagged</th><th>median similarity</th><th>median containment</th>
<th>typical containment (c0)</th></tr>
{period_rows}</table>
<img alt="distribution per period" src="data:image/png;base64,{dist}">
<h2>Most extreme flagged entities</h2>
{flagged_part}
{neighbour_part}
{exact_part}
</body></html>
"""
    path = Path(path)
    with atomic_file(path) as tmp:
        tmp.write_text(body, encoding="utf-8")
    return path
