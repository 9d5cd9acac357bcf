"""S-curve pictures: a text plot for the terminal and an SVG file (no plotting dependency).

PNG output uses matplotlib when it is installed (extra ``charts``); SVG never needs it.
"""

from __future__ import annotations

from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np

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


def write_chart(
    path: str | Path,
    bands: int,
    rows: int,
    threshold: float,
    histogram: PairHistogram | None = None,
) -> Path:
    """Write the chosen plan's S-curve, the threshold line and (data mode) the sample's
    pair-similarity histogram (log-scaled counts, second axis) as SVG or PNG."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".svg":
        text = _svg(bands, rows, threshold, histogram)
        tmp = path.with_name(f".{path.name}.tmp")
        tmp.write_text(text)
        tmp.replace(path)
    elif suffix == ".png":
        _png(path, bands, rows, threshold, histogram)
    else:
        raise ParameterError(f"--chart must end in .svg or .png; got {path.name!r}")
    return path


def _svg(bands, rows, threshold, histogram) -> str:
    w, h, left, right, top, bottom = 680, 400, 60, 100, 30, 50
    pw, ph = w - left - right, h - top - bottom

    def x(s):
        return left + s * pw

    def y(p):
        return top + (1 - p) * ph

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" '
        'font-family="sans-serif" font-size="12">',
        f'<rect x="0" y="0" width="{w}" height="{h}" fill="white"/>',
    ]
    if histogram is not None and len(histogram.counts):
        edges = np.linspace(0, 1, 51)
        counts = np.histogram(histogram.similarity, bins=edges, weights=histogram.counts)[0]
        logc = np.log10(counts + 1.0)
        top_log = max(logc.max(), 1.0)
        for i, c in enumerate(logc):
            if c <= 0:
                continue
            bh = c / top_log * ph
            parts.append(
                f'<rect x="{x(edges[i]):.1f}" y="{top + ph - bh:.1f}" width="{pw / 50 - 1:.1f}" '
                f'height="{bh:.1f}" fill="#c6d8ef"/>'
            )
        for e in range(int(np.floor(top_log)) + 1):
            ty = top + ph - e / top_log * ph
            parts.append(f'<text x="{left + pw + 6}" y="{ty + 4:.1f}" fill="#5b7fae">1e{e}</text>')
        parts.append(
            f'<text x="{left + pw + 42}" y="{top + ph / 2:.1f}" fill="#5b7fae" '
            f'transform="rotate(90 {left + pw + 42} {top + ph / 2:.1f})" text-anchor="middle">'
            "sampled pairs (log scale)</text>"
        )
    s = np.linspace(0, 1, 201)
    p = candidate_probability(s, bands, rows)
    points = " ".join(f"{x(a):.1f},{y(b):.1f}" for a, b in zip(s, p))
    parts += [
        f'<polyline points="{points}" fill="none" stroke="#1f4e8c" stroke-width="2"/>',
        f'<line x1="{x(threshold):.1f}" y1="{top}" x2="{x(threshold):.1f}" y2="{top + ph}" '
        'stroke="#c0392b" stroke-dasharray="5,4"/>',
        f'<line x1="{left}" y1="{top + ph}" x2="{left + pw}" y2="{top + ph}" stroke="black"/>',
        f'<line x1="{left}" y1="{top}" x2="{left}" y2="{top + ph}" stroke="black"/>',
    ]
    for t in np.linspace(0, 1, 6):
        parts.append(f'<text x="{x(t) - 8:.1f}" y="{top + ph + 18}">{t:.1f}</text>')
        parts.append(f'<text x="{left - 30}" y="{y(t) + 4:.1f}">{t:.1f}</text>')
    title = escape(f"P(candidate) = 1-(1-s^{rows})^{bands}; threshold {threshold}")
    parts += [
        f'<text x="{left}" y="{top - 10}" font-weight="bold">{title}</text>',
        f'<text x="{left + pw / 2 - 50}" y="{h - 10}">Jaccard similarity s</text>',
        f'<text x="14" y="{top + ph / 2:.1f}" transform="rotate(-90 14 {top + ph / 2:.1f})" '
        'text-anchor="middle">P(candidate)</text>',
        "</svg>",
    ]
    return "\n".join(parts) + "\n"


def _png(path, bands, rows, threshold, histogram) -> None:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise ParameterError(
            "--chart with .png needs matplotlib (pip install 'lshjob[charts]'); .svg needs nothing"
        ) from exc
    fig, ax = plt.subplots(figsize=(6.4, 4))
    s = np.linspace(0, 1, 201)
    ax.plot(s, candidate_probability(s, bands, rows), color="#1f4e8c", label=f"b={bands}, r={rows}")
    ax.axvline(threshold, color="#c0392b", linestyle="--", label=f"threshold {threshold}")
    ax.set_xlabel("Jaccard similarity s")
    ax.set_ylabel("P(candidate)")
    if histogram is not None:
        ax2 = ax.twinx()
        ax2.hist(histogram.similarity, bins=50, range=(0, 1), weights=histogram.counts, color="#c6d8ef", log=True)
        ax2.set_ylabel("sampled pairs (log)")
        ax.set_zorder(ax2.get_zorder() + 1)
        ax.patch.set_visible(False)
    ax.legend(loc="center right")
    tmp = path.with_name(f".{path.name}.tmp.png")
    fig.savefig(tmp, dpi=100)
    plt.close(fig)
    tmp.replace(path)
