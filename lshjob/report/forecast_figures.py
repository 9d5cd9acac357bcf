"""Figures of the forecast and of a store's history, drawn like :mod:`lshjob.report.figures`
(matplotlib's Agg canvas, SVG text to inline): curves of total seconds, peak memory and disk
against the number of entities with the measured run as a point, a plan's per-stage forecast
against the budget, and each refresh's seconds, peak memory and entities over time.
"""

from __future__ import annotations

import numpy as np

from lshjob.report.figures import CURVE, FILL, MARK, STAGE_ORDER, _figure, _svg


def curves(curve: list[dict], point: dict | None, budget: int) -> tuple[str, dict]:
    """Three panels against N (log scales): total seconds, peak memory with the budget, disk
    (work folder and index). ``point``: the measured run (``entities``, ``seconds``,
    ``peak_memory_bytes``, ``index_bytes``), drawn as a red dot. Returns the SVG and the arrays drawn."""
    n = np.array([c["entities"] for c in curve], dtype=np.float64)
    seconds = np.array([c["seconds"] for c in curve])
    memory = np.array([c["peak_memory_bytes"] for c in curve]) / 2**30
    disk = np.array([c["disk_bytes"] for c in curve]) / 2**30
    fig = _figure(width=9.0, height=3.0)
    panels = fig.subplots(1, 3)
    labels = ("total seconds", "peak memory (GiB)", "disk: work + index (GiB)")
    for ax, y, label in zip(panels, (seconds, memory, disk), labels):
        ax.plot(n, y, color=CURVE, linewidth=2, label="forecast")
        ax.set_xscale("log")
        ax.set_yscale("log" if (y > 0).any() else "linear")  # an empty index forecasts no disk
        ax.set_xlabel("entities N")
        ax.set_ylabel(label)
    panels[1].axhline(budget / 2**30, color=MARK, linestyle="--", label="budget")
    panels[2].plot(n, np.array([c.get("index_bytes", 0) for c in curve]) / 2**30, color=FILL, linewidth=2,
                   label="index alone")
    if point is not None:
        panels[0].plot([point["entities"]], [point["seconds"]], "o", color=MARK, label="measured run")
        panels[1].plot([point["entities"]], [point["peak_memory_bytes"] / 2**30], "o", color=MARK)
        if point.get("index_bytes"):
            panels[2].plot([point["entities"]], [point["index_bytes"] / 2**30], "o", color=MARK,
                           label="measured index")
    for ax in panels:
        ax.legend(loc="upper left", fontsize=7)
    return _svg(fig), {"n": n.tolist(), "seconds": seconds.tolist(), "memory_gib": memory.tolist(),
                       "disk_gib": disk.tolist()}


def stage_forecast(seconds: dict, peak: dict, budget: int) -> str:
    """A plan's forecast seconds and peak memory per stage, the budget dashed."""
    names = [s for s in STAGE_ORDER if s in seconds]
    fig = _figure(height=3.0)
    left, right = fig.subplots(1, 2)
    y = np.arange(len(names))
    left.barh(y, [seconds[s] for s in names], color=CURVE)
    left.set_yticks(y, names)
    left.invert_yaxis()
    left.set_xlabel("forecast seconds")
    right.barh(y, [peak[s] / 2**20 for s in names], color=FILL)
    right.axvline(budget / 2**20, color=MARK, linestyle="--", label=f"budget {budget / 2**30:.1f} GiB")
    right.set_yticks(y, [])
    right.invert_yaxis()
    right.set_xscale("log")
    right.set_xlabel("forecast peak memory (MiB)")
    right.legend(loc="lower right", fontsize=8)
    return _svg(fig)


def history(runs: list[dict]) -> str:
    """A store's refreshes in order: total seconds, largest per-stage peak memory, entities."""
    x = np.arange(len(runs))
    fig = _figure(width=9.0, height=2.8)
    panels = fig.subplots(1, 3)
    series = ([r.get("seconds") or 0 for r in runs],
              [max((r.get("peak_memory_bytes") or {0: 0}).values()) / 2**20 for r in runs],
              [r.get("entities") or 0 for r in runs])
    for ax, y, label in zip(panels, series, ("seconds", "peak memory (MiB)", "entities")):
        ax.plot(x, y, "o-", color=CURVE)
        ax.set_xlabel("refresh (oldest first)")
        ax.set_ylabel(label)
        ax.set_ylim(bottom=0)
    return _svg(fig)
