"""A run's forecast: seconds per stage, peak memory, disk, and whether it goes in parts.

:func:`forecast` applies a :class:`lshjob.plan.cost.CostModel` to the counts a plan predicts
(:class:`lshjob.plan.cost.Workload`) and to the memory budget, with the run's own rule for
"one part or several" (:meth:`lshjob.runtime.budget.Budget.one_part` over the loader's need,
:func:`lshjob.runtime.budget.grouping_bytes`). :func:`forecast_curve` gives the same at other
sizes (the report's curves against N).
"""

from __future__ import annotations

from dataclasses import replace

from lshjob.plan.cost import STAGES, CostModel, Workload
from lshjob.runtime.budget import Budget, default_memory, dense_span, grouping_bytes

SLICE_ROW_BYTES = 28  # a bucket row as the band engine counts it (lshjob.index.band.local.ROW_BYTES)
BOUNDED = ("join", "verify", "publish")  # stages whose memory the run sizes from the budget


def in_parts(w: Workload, memory: int, parts: int | None = None, dense_keys: bool = True) -> bool:
    """Whether the run groups its events a key range at a time: the run's own decision for the
    loader's need at this many events (integer keys numbered densely when ``dense_keys``)."""
    events = int(w.events)
    span = dense_span((0, max(int(w.entities) - 1, 0)), events) if dense_keys else 0
    return not Budget(memory, parts).one_part(grouping_bytes(events, False, span))


def forecast(model: CostModel, w: Workload, memory: int | None = None, parts: int | None = None,
             dense_keys: bool = True, seconds: dict | None = None, by_stage: dict | None = None) -> dict:
    """What ``lshjob plan`` prints under ``forecast``. In parts, the seconds are those of one
    part (each part's passes add a little) and the peak is held to the budget the run keeps to.
    ``seconds`` and ``by_stage`` (peak memory): found otherwise (scaled from runs of a sample,
    :mod:`lshjob.plan.scaling`) instead of the model's."""
    memory = memory or default_memory()
    split = in_parts(w, memory, parts, dense_keys)
    seconds = dict(seconds) if seconds is not None else model.stage_seconds(w)
    by_stage = (dict(by_stage) if by_stage is not None else
                model.stage_memory(w, Budget(memory).sign_slice_rows(w.perms, w.bands, SLICE_ROW_BYTES)))
    notes = []
    held = [s for s in BOUNDED if by_stage[s] > memory]
    for s in held:  # DuckDB's limit and spill, verification's and publishing's blocks: sized from the budget
        by_stage[s] = memory
    if held:
        notes.append(f"{', '.join(held)}: held to the budget (they work in blocks or spill to the work folder); "
                     "their seconds are those of the data in memory")
    peak = max(by_stage.values())
    if split:
        notes.append("in parts: seconds as for one part (each key range adds its passes); peak memory held "
                     "to the budget")
        peak = min(peak, memory)
    elif peak > memory:
        notes.append(f"the forecast peak {peak / 2**30:.1f} GiB exceeds the budget {memory / 2**30:.1f} GiB")
    return {
        "seconds": {k: round(v, 3) for k, v in seconds.items()},
        "peak_memory_bytes": int(peak),
        "peak_memory_by_stage": {s: int(by_stage[s]) for s in STAGES},
        "disk_bytes": _whole_bytes(model.disk_bytes(w, split)),
        "in_parts": split,
        "memory_budget_bytes": int(memory),
        "counts": {k: (round(v) if isinstance(v, float) else v) for k, v in w.to_dict().items()},
        "coefficients": model.describe(),
        "notes": notes,
    }


def scaled(w: Workload, factor: float, top_k: int = 20) -> Workload:
    """The workload of ``factor`` times the sets, with the same shape: events, sets and rows
    linear; candidate and verified pairs with the square of the sets (a uniform sample of a
    share p of the entities keeps p^2 of the pairs, as the planner scales them); published
    rows as the verified pairs, at most ``top_k`` an entity."""
    pairs = factor * factor
    return replace(w, events=w.events * factor, entities=w.entities * factor,
                   membership_rows=w.membership_rows * factor, representatives=w.representatives * factor,
                   candidate_pairs=w.candidate_pairs * pairs, verified_pairs=w.verified_pairs * pairs,
                   published_rows=min(w.published_rows * pairs, w.entities * factor * top_k),
                   shared_bucket_rows=None)


def forecast_curve(model: CostModel, w: Workload, sizes: list[float], memory: int | None = None,
                   top_k: int = 20) -> list[dict]:
    """Total seconds, peak memory, disk and the index's bytes at each entity count of ``sizes``."""
    out = []
    for n in sizes:
        f = forecast(model, scaled(w, n / max(w.entities, 1), top_k), memory)
        out.append({"entities": n, "seconds": f["seconds"]["total"], "peak_memory_bytes": f["peak_memory_bytes"],
                    "disk_bytes": f["disk_bytes"]["total"], "index_bytes": f["disk_bytes"]["output"],
                    "in_parts": f["in_parts"]})
    return out


def _whole_bytes(disk: dict[str, float]) -> dict[str, int]:
    """The disk forecast in whole bytes; the total is the sum of its rounded parts."""
    parts = {k: int(round(v)) for k, v in disk.items() if k != "total"}
    return {**parts, "total": sum(parts.values())}
