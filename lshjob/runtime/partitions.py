"""Entities cut into key ranges (*parts*) held one at a time, and where the parts' sets wait.

A job whose sets do not fit its budget (:meth:`lshjob.runtime.budget.Budget.one_part`)
counts the events per entity (:func:`events_per_entity`), cuts the entities, in key order,
into consecutive ranges of about equal cost (:func:`key_ranges`), and reads a range at a
time (:class:`EntitySelection`). A run saves each part's sets in its work folder
(:class:`PartStore`) until verification, or holds them all (:class:`HeldSets`). The
functions take plain frames and counts; the cost of an event is the caller's
(:func:`lshjob.runtime.budget.bytes_per_event`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets


@dataclass(frozen=True)
class EntitySelection:
    """The events of some entities: those matching ``condition`` (on the ``entity`` column),
    exactly ``events`` of them (counted beforehand), keys within ``entity_range`` when the
    keys are integers."""

    condition: pl.Expr
    events: int
    entity_range: tuple[int, int] | None = None
    # integer keys and their event counts, when counted beforehand: the two-pass reader
    # then skips its counting pass
    key_counts: tuple[np.ndarray, np.ndarray] | None = None


def events_per_entity(frame: pl.LazyFrame) -> pl.DataFrame:
    """``entity`` (sorted) and ``events`` (UInt32): one row per entity key, one streaming pass."""
    return frame.group_by("entity").agg(pl.len().alias("events")).collect(engine="streaming").sort("entity")


def key_ranges(counts: pl.DataFrame, range_bytes: int, parts: int | None = None, *, event_bytes: float,
               bytes_per_entity: float = 0.0) -> list[EntitySelection]:
    """Cut the entities (``counts`` from :func:`events_per_entity`) into consecutive key ranges
    of about equal cost (``event_bytes`` an event plus ``bytes_per_entity`` an entity): as few
    as keep each range within ``range_bytes``, or exactly ``parts`` of them (fewer if there
    are fewer entities)."""
    n = counts.height
    per_entity = counts["events"].to_numpy().astype(np.int64)
    cum = np.cumsum(per_entity * event_bytes + bytes_per_entity)
    total = float(cum[-1]) if n else 0.0
    if parts is None:
        parts = max(1, math.ceil(total / max(range_bytes, 1)))
    parts = max(1, min(parts, n))
    cuts = np.searchsorted(cum, [total * i / parts for i in range(1, parts)], side="left") + 1
    bounds = np.unique(np.concatenate([[0], np.clip(cuts, 1, n), [n]]))
    keys = counts["entity"]
    integer = keys.dtype.is_integer()
    values = keys.to_numpy() if integer else None
    out = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        first, last = keys[int(a)], keys[int(b) - 1]
        out.append(EntitySelection(
            condition=pl.col("entity").is_between(pl.lit(first, dtype=keys.dtype), pl.lit(last, dtype=keys.dtype)),
            events=int(per_entity[a:b].sum()),
            entity_range=(int(first), int(last)) if integer else None,
            key_counts=(values[a:b], per_entity[a:b]) if integer else None,
        ))
    return out


def planning_sample(counts: pl.DataFrame, budget_events: int, seed: int = 0) -> EntitySelection:
    """A uniform random sample of entities whose events number about ``budget_events`` (all
    entities when they fit)."""
    n = counts.height
    total = int(counts["events"].sum())
    m = n if total <= budget_events else max(2, int(n * budget_events / max(total, 1)))
    return entities_of(counts, np.sort(np.random.default_rng(seed).choice(n, size=min(m, n), replace=False)))


def entities_of(counts: pl.DataFrame, picked: np.ndarray) -> EntitySelection:
    """The entities at (ascending) positions ``picked`` of ``counts``."""
    keys = counts["entity"].gather(picked)
    per_entity = counts["events"].gather(picked).to_numpy().astype(np.int64)
    integer = keys.dtype.is_integer()
    return EntitySelection(
        condition=pl.col("entity").is_in(keys.implode()),
        events=int(per_entity.sum()),
        entity_range=(int(keys[0]), int(keys[-1])) if integer else None,
        key_counts=(keys.to_numpy(), per_entity) if integer else None,
    )


@dataclass
class PartStore:
    """The sets of each part, saved in the work folder between the part's reading and the
    verification. Part i holds entity ids ``ranges[i][0]..ranges[i][1]``."""

    folder: Path
    text_hashes: np.ndarray | None
    ranges: list[tuple[int, int]] = field(default_factory=list)

    def save(self, sets: ElementSets) -> None:
        i = len(self.ranges)
        first = self.ranges[-1][1] + 1 if self.ranges else 0
        self.folder.mkdir(parents=True, exist_ok=True)
        np.save(self.folder / f"part-{i}-offsets.npy", sets.offsets)
        np.save(self.folder / f"part-{i}-elements.npy", sets.elements)
        self.ranges.append((first, first + sets.size - 1))

    def load(self, i: int) -> ElementSets:
        offsets = np.load(self.folder / f"part-{i}-offsets.npy")
        elements = np.load(self.folder / f"part-{i}-elements.npy")
        return ElementSets(pl.Series("entity", [], dtype=pl.Int64), offsets, elements, self.text_hashes)


class HeldSets:
    """All sets in memory, as one part (the usual run)."""

    def __init__(self, sets: ElementSets) -> None:
        self.sets = sets
        self.ranges = [(0, sets.size - 1)]

    def load(self, i: int) -> ElementSets:
        return self.sets

    def saved(self, folder: Path) -> PartStore:
        """The sets saved in ``folder`` as one part, so the caller can let them go (the join
        then gets their memory; verification loads them again)."""
        store = PartStore(folder, self.sets.text_hashes)
        store.save(self.sets)
        return store
