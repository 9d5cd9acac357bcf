"""Escaped HTML fragments shared by the pages: a figure with its SVG inline, a table, a size."""

from __future__ import annotations

import json
from html import escape

from lshjob.report import figures


def figure(name: str, svg: str, points: dict | None, caption: str) -> str:
    """``svg`` in a ``figure`` of id ``figure-NAME`` (its ids prefixed), the ``points`` drawn as
    ``data-KEY`` JSON attributes, and the caption."""
    data = "".join(f" data-{key}=\"{escape(json.dumps(values))}\"" for key, values in (points or {}).items())
    return (f'<figure class="figure" id="figure-{name}"{data}>\n{figures.svg_ids_free(svg, name + "-")}\n'
            f"<figcaption>{escape(caption)}</figcaption>\n</figure>\n")


def table(head: tuple, rows: list[tuple], table_id: str) -> str:
    """A table of id ``table_id``: the first column left-aligned as names, every cell escaped."""
    cells = "".join(f'<th class="name">{escape(h)}</th>' if i == 0 else f"<th>{escape(h)}</th>"
                    for i, h in enumerate(head))
    body = "".join("<tr>" + "".join(f'<td class="name">{escape(str(v))}</td>' if i == 0 else
                                    f"<td>{escape(str(v))}</td>" for i, v in enumerate(row)) + "</tr>\n"
                   for row in rows)
    return f'<table id="{table_id}">\n<tr>{cells}</tr>\n{body}</table>\n'


def size(value) -> str:
    """Bytes as text: GiB, MiB, KiB or B; '-' for None."""
    if value is None:
        return "-"
    for unit, step in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if value >= step:
            return f"{value / step:.1f} {unit}"
    return f"{int(value)} B"
