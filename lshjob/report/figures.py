"""The index report's figures, drawn by matplotlib (its Agg canvas, no pyplot state) as SVG text
to inline in the page: no metadata block, a fixed salt for clip-path ids, text kept as text; the
only web addresses left are the SVG and XLink namespace names, which are never fetched. Each
function returns the SVG and, where a test or a reader may check them, the arrays drawn.
"""

from __future__ import annotations

import io
import re

import numpy as np

from lshjob.plan.banding import PairHistogram, candidate_probability

S_POINTS = 101  # points of the S-curve, s = 0, 0.01, ..., 1
CURVE = "#1f4e8c"
MARK = "#c0392b"
FILL = "#9bb7dd"
STAGE_ORDER = ("ingest", "sign", "plan", "collapse", "band", "join", "verify", "publish")  # as a run goes


def _figure(width: float = 6.8, height: float = 3.6):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _svg(fig) -> str:
    import matplotlib

    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": "lshjob", "svg.fonttype": "none"}):
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    text = text[text.index("<svg"):]  # no XML declaration or doctype inside HTML
    return re.sub(r"\s*<metadata>.*?</metadata>", "", text, count=1, flags=re.S)  # RDF with web addresses


def s_curve(bands: int, rows: int, threshold: float, histogram: PairHistogram | None) -> tuple[str, dict]:
    """The plan's S-curve P(s) = 1-(1-s^r)^b (Mining of Massive Datasets, section 3.4) with the
    threshold, over the sample's pair-similarity histogram when there is one. Returns the SVG
    and the points drawn (``s``, ``p``)."""
    s = np.linspace(0.0, 1.0, S_POINTS)
    p = candidate_probability(s, bands, rows)
    fig = _figure()
    ax = fig.add_subplot()
    if histogram is not None and len(histogram.counts):
        ax2 = ax.twinx()
        ax2.hist(histogram.similarity, bins=50, range=(0, 1), weights=histogram.counts, color="#d5e2f2", log=True)
        ax2.set_ylabel("sampled pairs (log scale)")
        ax.set_zorder(ax2.get_zorder() + 1)
        ax.patch.set_visible(False)
    ax.plot(s, p, color=CURVE, linewidth=2, label=f"b={bands}, r={rows}")
    ax.axvline(threshold, color=MARK, linestyle="--", label=f"threshold {threshold}")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("Jaccard similarity s")
    ax.set_ylabel("P(candidate)")
    ax.legend(loc="center right")
    return _svg(fig), {"s": s.tolist(), "p": p.tolist()}


def stages(seconds: dict, peak: dict, budget: int) -> tuple[str, list[str]]:
    """Seconds per stage and peak memory per stage against the memory budget, side by side.
    Returns the SVG and the stages in the order drawn."""
    names = sorted((name for name in seconds if name != "total"),
                   key=lambda n: (STAGE_ORDER.index(n) if n in STAGE_ORDER else len(STAGE_ORDER), n))
    fig = _figure(height=3.2)
    left, right = fig.subplots(1, 2)
    y = np.arange(len(names))
    left.barh(y, [seconds[n] for n in names], color=CURVE)
    left.set_yticks(y, names)
    left.invert_yaxis()
    left.set_xlabel("seconds")
    right.barh(y, [peak.get(n, 0) / 2**20 for n in names], color=FILL)
    right.axvline(budget / 2**20, color=MARK, linestyle="--", label=f"budget {budget / 2**30:.1f} GiB")
    right.set_yticks(y, [])
    right.invert_yaxis()
    right.set_xlabel("peak memory (MiB)")
    right.legend(loc="lower right", fontsize=8)
    return _svg(fig), names


def distributions(per_entity: np.ndarray, jaccard: np.ndarray, threshold: float) -> str:
    """Neighbours per entity (entities without any counted) and the Jaccard of published rows."""
    fig = _figure(height=3.0)
    left, right = fig.subplots(1, 2)
    top = int(per_entity.max()) if per_entity.size else 0
    left.hist(per_entity, bins=np.arange(top + 2) - 0.5, color=CURVE)
    left.set_xlabel("neighbours per entity")
    left.set_ylabel("entities")
    right.hist(jaccard, bins=40, range=(threshold, 1.0) if threshold < 1.0 else (0.0, 1.0), color=FILL)
    right.set_xlabel("Jaccard of published rows")
    right.set_ylabel("rows")
    return _svg(fig)


def svg_ids_free(svg: str, prefix: str) -> str:
    """The SVG with its element ids (and references to them) prefixed, so that several
    figures inlined in one page never share an id."""
    return re.sub(r'(id="|url\(#|href="#)', lambda m: m.group(1) + prefix, svg)
