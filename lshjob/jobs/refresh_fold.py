"""Folding a batch of events into the store's periods (for :mod:`lshjob.jobs.refresh`).

A period's set of an entity is the distinct elements of its events in that period; the window
set is the union over the window's periods, the same set ``lshjob run`` builds from the
window's events (set union is associative, commutative and idempotent, so the order of the
batches, late events and a batch folded twice change nothing). The window is the newest
``window`` periods, counted back from the newest period seen (in the store or the batch),
every calendar period counted whether it holds events or not.
"""

from __future__ import annotations

from dataclasses import dataclass, field
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


@dataclass
class Folded:
    """The window's periods after folding a batch in, and what changed."""

    periods: list[Period]  # the window's, oldest first; changed ones name files still to write
    changed: dict[date, pl.DataFrame]  # period -> its new sets table (entity, element), sorted
    expired: list[Period]
    replaced: list[Period]  # periods whose earlier files the new ones replace
    added: dict[date, pl.Series] = field(default_factory=dict)  # replaced period -> entities that gained rows


def fold(store: Path, state: State, batch: Batch, run_id: str) -> Folded:
    """Add the batch's rows to their periods and drop the periods that left the window."""
    held = {p.period: p for p in state.periods}
    changed: dict[date, pl.DataFrame] = {}
    replaced: list[Period] = []
    added_entities: dict[date, pl.Series] = {}
    for (period,), rows in sorted(batch.rows.partition_by("period", as_dict=True, include_key=False).items()):
        rows = rows.unique(PAIR)
        if period in held:
            before = store_files.read_table(store, held[period].sets_file)
            added = rows.join(before, on=PAIR, how="anti")
            if added.height == 0:
                continue
            rows = pl.concat([before, added], how="vertical")
            replaced.append(held[period])
            added_entities[period] = added["entity"].unique()
        changed[period] = rows.sort(PAIR)
    expired = [p for p in state.periods if p.period < batch.window_first]
    periods = []
    for period in sorted(set(held) | set(changed)):
        if period < batch.window_first:
            continue
        if period in changed:
            table = changed[period]
            periods.append(Period(period, store_files.period_file(period, run_id, "sets"), None,
                                  table["entity"].n_unique(), table.height, run_id))
        else:
            periods.append(held[period])
    return Folded(periods, changed, expired, replaced, added_entities)


def changed_entities(store: Path, before: list[Period], after: list[Period], fresh: dict[date, pl.DataFrame]) -> int:
    """Entities whose window set differs between the two windows (a pair gained or lost)."""
    def pairs(periods: list[Period], new: bool) -> pl.LazyFrame:
        frames = [fresh[p.period].lazy() if new and p.period in fresh else store_files.scan_tables(store, [p.sets_file])
                  for p in periods]
        return pl.concat(frames, how="vertical").unique(PAIR) if frames else pl.LazyFrame(schema=_schema(fresh))

    if not before:
        return int(pairs(after, True).select(pl.col("entity").n_unique()).collect().item())
    old, new = pairs(before, False), pairs(after, True)
    gained = new.join(old, on=PAIR, how="anti").select("entity")
    lost = old.join(new, on=PAIR, how="anti").select("entity")
    return int(pl.concat([gained, lost]).select(pl.col("entity").n_unique()).collect().item())


def _schema(fresh: dict[date, pl.DataFrame]) -> dict:
    return next(iter(fresh.values())).schema if fresh else {"entity": pl.String, "element": pl.String}


def write_window(store: Path, periods: list[Period], fresh: dict[date, pl.DataFrame], spec: EventSpec,
                 path: Path) -> int:
    """The window's membership rows as events (columns named as the batch's) for ``lshjob run``."""
    frames = [fresh[p.period].lazy() if p.period in fresh else store_files.scan_tables(store, [p.sets_file])
              for p in periods]
    if not frames:
        raise InputError("no event falls in the window: nothing to index")
    table = pl.concat(frames, how="vertical").rename({"entity": spec.entity, "element": spec.element})
    path.parent.mkdir(parents=True, exist_ok=True)
    table.sink_parquet(path, compression="zstd")
    return pl.scan_parquet(path).select(pl.len()).collect().item()
