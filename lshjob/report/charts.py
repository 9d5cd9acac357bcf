"""S-curve pictures: a text plot for the terminal, and SVG or PNG files drawn by matplotlib.

matplotlib is imported only when a chart is written (its Agg canvas; no window, no pyplot
state). The SVG is the same bytes for the same plan: no date in its metadata and a fixed
salt for the ids matplotlib gives clip paths (``svg.hashsalt``), so a chart can be compared
or committed (same matplotlib version).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from lshjob.core.atomic import atomic_file
from lshjob.errors import ParameterError
from lshjob.plan.banding import PairHistogram, candidate_probability


def text_s_curve(bands: int, rows: int, threshold: float, width: int = 60, height: int = 12) -> str:
    """The S-curve P(s) = 1-(1-s^r)^b drawn with characters; '|' marks the threshold."""
    grid = [[" "] * width for _ in range(height)]
    col_t = min(width - 1, int(round(threshold * (width - 1))))
    for y in range(height):
        grid[y][col_t] = "|"
    for x in range(width):
        p = float(candidate_probability(x / (width - 1), bands, rows))
        y = height - 1 - int(round(p * (height - 1)))
        grid[y][x] = "*"
    lines = []
    for y, row in enumerate(grid):
        label = "1.0" if y == 0 else ("0.0" if y == height - 1 else "   ")
        lines.append(f"{label} {''.join(row)}")
    lines.append("    " + "0" + " " * (width - 2) + "1")
    lines.append(f"    P(candidate) vs Jaccard s for b={bands}, r={rows}; '|' is the threshold {threshold}")
    return "\n".join(lines)


CHART_SIZE = (680, 400)  # pixels of a PNG at 100 dpi; an SVG is the same figure (6.8 x 4 inches)
CURVE_ID = "s-curve"  # the curve's group id in the SVG


def write_chart(
    path: str | Path,
    bands: int,
    rows: int,
    threshold: float,
    histogram: PairHistogram | None = None,
    size: tuple[int, int] = CHART_SIZE,
) -> Path:
    """Write the chosen plan's S-curve, the threshold line and (data mode) the sample's
    pair-similarity histogram (log-scaled counts, second axis) as SVG or PNG of ``size``
    (width, height) pixels."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".svg", ".png"):
        raise ParameterError(f"--chart must end in .svg or .png; got {path.name!r}")
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    dpi = 100
    with matplotlib.rc_context({"svg.hashsalt": "lshjob", "svg.fonttype": "none"}):
        fig = Figure(figsize=(size[0] / dpi, size[1] / dpi), dpi=dpi, layout="constrained")
        FigureCanvasAgg(fig)
        _draw(fig, bands, rows, threshold, histogram)
        metadata = {"Date": None} if suffix == ".svg" else None
        with atomic_file(path) as tmp:
            fig.savefig(tmp, format=suffix[1:], dpi=dpi, metadata=metadata)
    return path


def _draw(fig, bands: int, rows: int, threshold: float, histogram: PairHistogram | None) -> None:
    ax = fig.add_subplot()
    s = np.linspace(0, 1, 201)
    ax.plot(s, candidate_probability(s, bands, rows), color="#1f4e8c", linewidth=2,
            label=f"b={bands}, r={rows}", gid=CURVE_ID)
    ax.axvline(threshold, color="#c0392b", linestyle="--", label=f"threshold {threshold}")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("Jaccard similarity s")
    ax.set_ylabel("P(candidate)")
    ax.set_title(f"P(candidate) = 1-(1-s^{rows})^{bands}; threshold {threshold}", fontsize=10)
    if histogram is not None and len(histogram.counts):
        ax2 = ax.twinx()
        ax2.hist(histogram.similarity, bins=50, range=(0, 1), weights=histogram.counts, color="#c6d8ef", log=True)
        ax2.set_ylabel("sampled pairs (log scale)")
        ax.set_zorder(ax2.get_zorder() + 1)
        ax.patch.set_visible(False)
    ax.legend(loc="center right")
