"""Folding a batch of events into the store's periods (for :mod:`lshjob.jobs.refresh`).

A period's set of an entity is the distinct elements of its events in that period; the window
set is the union over the window's periods, the same set ``lshjob run`` builds from the
window's events (set union is associative, commutative and idempotent, so the order of the
batches, late events and a batch folded twice change nothing). The window is the newest
``window`` periods, counted back from the newest period seen (in the store or the batch),
every calendar period counted whether it holds events or not.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import date
from pathlib import Path

import polars as pl

from lshjob.errors import InputError
from lshjob.ingest.spec import EventSpec, group_set_rows, validated_events
from lshjob.store import files as store_files
from lshjob.store.catalog import Period, State

OFFSET = {"day": "d", "week": "w", "month": "mo"}
PAIR = ["entity", "element"]


@dataclass
class Batch:
    """The batch's membership rows in the window and what was read and left out."""

    rows: pl.DataFrame  # entity, period, element: distinct, periods within the window
    rows_read: int
    null_rows_dropped: int
    rows_older_than_window: int
    window_first: date
    window_last: date
    key_types: dict[str, str] = field(default_factory=dict)  # entity, element: integer or text


def first_of_window(newest: date, period: str, window: int) -> date:
    """Start of the oldest of the ``window`` periods ending with the one starting ``newest``."""
    if window == 1:
        return newest
    return pl.Series([newest]).dt.offset_by(f"-{window - 1}{OFFSET[period]}").item()


def read_batch(events: str | Path, spec: EventSpec, state: State, window: int) -> Batch:
    """Check and read the batch, find the window, and keep the batch's rows within it. An
    empty batch (a night without events) is no error once the store holds periods: the
    window stays where it was (its newest period is the newest seen)."""
    frame, report, where = validated_events(events, spec, allow_empty=True)
    kinds = {name: _kind(name, column, frame, state, where)
             for name, column in (("entity", spec.entity), ("element", spec.element))}
    frame = frame.with_columns(pl.col(n).cast(pl.Int64 if k == "integer" else pl.String, strict=True)
                               for n, k in kinds.items())
    with report.reading(where):
        per_period = frame.group_by("period").agg(pl.len().alias("rows")).collect()
    seen = [d for d in [per_period["period"].max()] + [p.period for p in state.periods] if d is not None]
    if not seen:
        raise InputError(f"{where}: no events (0 rows), and the store holds none yet: nothing to index")
    newest = max(seen)
    first = first_of_window(newest, spec.period, window)
    older = int(per_period.filter(pl.col("period") < first)["rows"].sum())
    rows = group_set_rows(frame.filter(pl.col("period") >= first), spec, where, report, allow_empty=True)
    return Batch(rows.select("entity", "period", "element"), report.rows_read, report.null_rows_dropped,
                 older, first, newest, {f"{n}_type": k for n, k in kinds.items()})


def _kind(name: str, column: str, frame: pl.LazyFrame, state: State, where: str) -> str:
    """Keys are kept as Int64 (integer keys) or String (text): one kind per store."""
    kind = "integer" if frame.collect_schema()[name].is_integer() else "text"
    stored = state.facts.get(f"{name}_type")
    if stored is not None and stored != kind:
        raise InputError(f"{where}: column {column!r} holds {kind} keys; the store holds {stored} keys for it")
    return kind


MAX_SET_DELTAS = 8  # delta files a period's sets keep before they are folded into one file


@dataclass
class Folded:
    """The window's periods after folding a batch in, and what changed."""

    periods: list[Period]  # the window's, oldest first; changed ones name files still to write
    changed: dict[date, pl.DataFrame]  # period -> rows to write: a sets delta, or the period's whole table
    expired: list[Period]
    replaced: list[Period]  # periods whose earlier files the new ones replace or extend
    pending: set[str] = field(default_factory=set)  # files the periods name, not written yet


def fold(store: Path, state: State, batch: Batch, run_id: str) -> Folded:
    """Add the batch's rows to their periods and drop the periods that left the window. A
    period already held gains a sets delta file of the batch's rows (no file is read; its
    set is the union of its files), or, past :data:`MAX_SET_DELTAS`, one file of them all."""
    held = {p.period: p for p in state.periods}
    changed: dict[date, pl.DataFrame] = {}
    replaced: list[Period] = []
    periods: dict[date, Period] = {}
    pending: set[str] = set()
    for (period,), rows in sorted(batch.rows.partition_by("period", as_dict=True, include_key=False).items()):
        rows = rows.sort(PAIR)  # distinct already: the batch's rows are one per (entity, period, element)
        old = held.get(period)
        if old is not None and len(old.set_deltas) < MAX_SET_DELTAS:
            delta = store_files.period_file(period, run_id, "sets-delta")
            periods[period] = replace(old, entities=old.entities + rows["entity"].n_unique(),
                                      membership_rows=old.membership_rows + rows.height,
                                      set_deltas=(*old.set_deltas, delta), run_id=run_id)
            pending.add(delta)
        else:
            if old is not None:  # folded into one file with its earlier ones
                rows = pl.concat([scan_periods(store, [old]), rows.lazy()]).unique(PAIR).sort(PAIR).collect()
            base = store_files.period_file(period, run_id, "sets")
            periods[period] = Period(period, base, None, rows["entity"].n_unique(), rows.height, run_id)
            pending.add(base)
        if old is not None:
            replaced.append(old)
        changed[period] = rows
    expired = [p for p in state.periods if p.period < batch.window_first]
    window = [periods.get(d) or held[d] for d in sorted(set(held) | set(periods)) if d >= batch.window_first]
    return Folded(window, changed, expired, replaced, pending)


def scan_periods(store: Path, periods: list[Period], folded: Folded | None = None) -> pl.LazyFrame:
    """The (entity, element) rows of ``periods``: their files (with a fold's rows not written
    yet); an entity's element may repeat across a period's files."""
    frames = []
    for p in periods:
        files = [f for f in (p.sets_file, *p.set_deltas) if folded is None or f not in folded.pending]
        if files:
            frames.append(store_files.scan_tables(store, files))
        if folded is not None and p.period in folded.changed:
            frames.append(folded.changed[p.period].lazy())
    return pl.concat(frames, how="vertical") if frames else pl.LazyFrame(schema={"entity": pl.String,
                                                                                 "element": pl.String})


def changed_entities(store: Path, before: list[Period], folded: Folded) -> int:
    """Entities whose window set differs between the two windows (a pair gained or lost)."""
    new = scan_periods(store, folded.periods, folded).unique(PAIR)
    if not before:
        return int(new.select(pl.col("entity").n_unique()).collect().item())
    old = scan_periods(store, before).unique(PAIR)
    gained = new.join(old, on=PAIR, how="anti").select("entity")
    lost = old.join(new, on=PAIR, how="anti").select("entity")
    return int(pl.concat([gained, lost]).select(pl.col("entity").n_unique()).collect().item())


def write_window(store: Path, folded: Folded, spec: EventSpec, path: Path) -> int:
    """The window's membership rows as events (columns named as the batch's) for ``lshjob run``."""
    if not folded.periods:
        raise InputError("no event falls in the window: nothing to index")
    table = scan_periods(store, folded.periods, folded).unique(PAIR).rename(
        {"entity": spec.entity, "element": spec.element})
    path.parent.mkdir(parents=True, exist_ok=True)
    table.sink_parquet(path, compression="zstd")
    return pl.scan_parquet(path).select(pl.len()).collect().item()
