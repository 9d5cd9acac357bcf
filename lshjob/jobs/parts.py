"""Runs whose sets do not fit the memory budget: the entities a key range at a time.

When grouping every event at once would take more than half the budget, the run cuts the
entities, in key order, into consecutive key ranges (*parts*) of about equal grouping cost,
each within what is left of the budget (:func:`key_ranges`). Then, a part at a time:

1. its events are read (a filtered pass over the input; for integer keys in a small range
   the counts of the counting pass give each key its slots, :mod:`lshjob.ingest.loading`) and
   grouped into sets;
2. identical sets are collapsed within the part (:mod:`lshjob.index.collapse`);
3. its representatives are signed and their bucket keys saved to the work folder (8 bytes
   a band and representative; :func:`lshjob.index.band.save_keys`);
4. its sets are saved to the work folder (:class:`PartStore`) and dropped.

Entity ids stay global (position of the key among all keys), and a part holds consecutive
ids, so the join is unchanged; it only writes the candidates split by the parts of their two
sides (``sql/candidate_blocks.sql``); the band search reads the saved keys one band at a
time, and verification holds two parts at a time
(:func:`verify_blocks`): P parts cost P + P(P-1)/2 loads of saved sets.

Identical sets in different parts keep one representative each. Their signatures agree, so
they share every band, and verification finds Jaccard 1.0 between them; the published index
is the same as in one part (tested).

The planner sees a uniform random sample of entities (as many as half a part holds), read in
one more filtered pass; pair counts are scaled to all entities
(:func:`lshjob.plan.similarity.sample_histogram_from_sets`).

Cost: besides the validation pass, a pass counts events per entity (polars, streaming),
one reads the sample, and each part reads the events again. What the run keeps across parts:
the entity keys, 8 bytes per entity (representative of each) and the per-entity event
counts; the band search then holds 8 bytes per entity and about 40 a thread
(:mod:`lshjob.index.band`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.ingest.loading import (BYTES_PER_EVENT, BYTES_PER_EVENT_IN_RANGE, BYTES_PER_KEY_VALUE, EntitySelection,
                      EventSource, dense_span, grouping_need)
from lshjob.errors import ParameterError
from lshjob.core.slicing import SLICE_ROWS, slice_bounds
from lshjob.sign.streaming import SLICES_IN_FLIGHT
from lshjob.core.sets import Membership
from lshjob.sign.signatures import SignatureParams
from lshjob.index.verify import add_estimates_between, verify_between

ONE_PART_SHARE = 0.5  # grouping all events may take this share of the budget, else parts
PART_SHARE = 0.5  # what grouping one part may take, of what the run does not hold across parts
COPY_BYTES = 512 << 20  # streaming ranges' signatures into one file, beside the ranges: merge under
# 700MB peaked at 1.02 GiB, sign at 0.79 GiB (1M entities, measured), so budgets under 1GiB are refused
SIGN_PART_SHARE = 0.75  # the same for lshjob sign, which holds nothing else (10M at 4GB: peak 2.3 GB at 0.5)
HELD_BYTES_PER_ENTITY = 32  # representative, event count and key (about 8 bytes of a key)
PROCESS_BYTES = 256 << 20  # the interpreter with polars, numba and DuckDB loaded: about 200 MiB measured
VERIFY_BYTES_PER_PAIR = 64  # candidate row in polars and numpy, plus the float results
MIN_VERIFY_SLICE = 1_000_000
ESTIMATE_SHARE = 16  # the verified pairs' signatures (for their estimate) take a 16th of the budget at a time


def events_per_entity(events: EventSource | pl.LazyFrame) -> pl.DataFrame:
    """``entity`` (sorted) and ``events`` (UInt32): one row per entity key, one streaming pass."""
    if isinstance(events, pl.LazyFrame):
        return events.group_by("entity").agg(pl.len().alias("events")).collect(engine="streaming").sort("entity")
    with events.report.reading(events.where):  # a file failing to read is named
        return events_per_entity(events.frame)


def bytes_per_event(events: EventSource) -> float:
    """Grouping cost of an event: 8 bytes (16 weighted) when the integer keys lie in a small
    range, plus the range's table spread over the events; else 20 (36)."""
    span = dense_span(events.report.entity_range, events.events)
    if span:
        return BYTES_PER_EVENT_IN_RANGE[events.weighted] + BYTES_PER_KEY_VALUE * span / max(events.events, 1)
    return BYTES_PER_EVENT[events.weighted]


def held_bytes(entities: int) -> int:
    """What a run in parts holds across parts (module docstring), beside the process itself."""
    return PROCESS_BYTES + entities * HELD_BYTES_PER_ENTITY


def part_budget(memory: int, entities: int, share: float | None = None) -> int:
    """Bytes grouping one part may take: a share of what is not held across parts (the rest
    is for signing a slice, polars' batches and the saved part's copy), and never under a
    tenth of the budget (parts smaller than that would cost more passes than they save)."""
    return int(max((share or PART_SHARE) * (memory - held_bytes(entities)), memory // 10))


def key_ranges(counts: pl.DataFrame, events: EventSource | None, budget: int, parts: int | None = None,
               bytes_per_entity: float = 0.0, event_bytes: float | None = None) -> list[EntitySelection]:
    """Cut the entities (``counts`` from :func:`events_per_entity`) into consecutive key ranges
    of about equal cost (grouping bytes of their events, or ``event_bytes`` a row, plus
    ``bytes_per_entity`` each): as few as keep each part within ``budget`` bytes, or exactly
    ``parts`` of them (fewer if there are fewer entities)."""
    n = counts.height
    per_entity = counts["events"].to_numpy().astype(np.int64)
    cum = np.cumsum(per_entity * (event_bytes if event_bytes is not None else bytes_per_event(events))
                    + bytes_per_entity)
    total = float(cum[-1]) if n else 0.0
    if parts is None:
        parts = max(1, math.ceil(total / max(budget, 1)))
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


SIGNATURE_BYTES_PER_ENTITY = 40  # beside the 8k signature bytes: set size, key, list offsets


def signing_ranges(events: EventSource, perms: int, memory: int, parts: int | None = None) -> list[EntitySelection] | None:
    """Key ranges for ``lshjob sign`` when the events' sets need more than half of what the
    signature slices in flight to the writer leave of the budget; None when one part will do.
    The signatures themselves are made and written a slice at a time, so each entity costs
    only its key, set size and list offsets (about 40 bytes) beside its events. The entities
    are counted (one more pass) only when a bound says they might not fit."""
    if parts == 1:
        return None
    per_entity = SIGNATURE_BYTES_PER_ENTITY
    usable = memory - SLICES_IN_FLIGHT * SLICE_ROWS * 8 * perms
    need = grouping_need(events)
    span = dense_span(events.report.entity_range, events.events) or events.events
    if parts is None and need + min(events.events, span) * per_entity <= ONE_PART_SHARE * usable:
        return None
    counts = events_per_entity(events)
    if parts is None and need + counts.height * per_entity <= ONE_PART_SHARE * usable:
        return None
    require_copy_budget(memory, f"{events.where}: the sets", "signing")
    return key_ranges(counts, events, part_budget(usable, counts.height, SIGN_PART_SHARE), parts,
                      bytes_per_entity=per_entity)


def keyed_signing_ranges(frame: pl.LazyFrame, events: int, where: str, perms: int, memory: int,
                         parts: int | None = None) -> list[EntitySelection] | None:
    """Key ranges of entities for ``lshjob sign`` with segments or periods of text entity keys,
    whose sets polars groups (:func:`lshjob.ingest.spec.group_events`) at about
    ``KEYED_BYTES_PER_EVENT`` (integer keys go through :mod:`lshjob.ingest.keyed`); None when
    all of them fit half of what the slices in flight to the writer leave of the budget. A
    set's key starts with its entity, so every set lies in one range, and ranges in entity
    order keep the file sorted by key."""
    if parts == 1:
        return None
    usable = memory - SLICES_IN_FLIGHT * SLICE_ROWS * 8 * perms
    if parts is None and events * KEYED_BYTES_PER_EVENT <= ONE_PART_SHARE * usable:
        return None
    require_copy_budget(memory, f"{where}: the sets", "signing")
    counts = events_per_entity(frame)
    return key_ranges(counts, None, part_budget(usable, counts.height, SIGN_PART_SHARE), parts,
                      event_bytes=KEYED_BYTES_PER_EVENT)


# polars' group-by over (entity, segment, period, element), then the signing of its rows: 229
# bytes an event at the peak (10M events, text segments, monthly periods; measured)
KEYED_BYTES_PER_EVENT = 256


def require_copy_budget(memory: int, what: str, doing: str) -> None:
    """Refuse a budget under 1GiB for work that streams key ranges' signatures into one file:
    the writer and polars' readers take about ``COPY_BYTES`` whatever the size (measured)."""
    if memory < PROCESS_BYTES + COPY_BYTES + (256 << 20):
        raise ParameterError(
            f"{what} need more than half of the memory budget ({memory / 2**30:.2f} GiB), and {doing} "
            f"them a key range at a time needs at least 1GiB: writing the ranges' signatures into one "
            f"file takes about {COPY_BYTES >> 20} MiB whatever their size (measured); raise --memory")


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

    def save(self, sets: Membership) -> None:
        i = len(self.ranges)
        first = self.ranges[-1][1] + 1 if self.ranges else 0
        self.folder.mkdir(parents=True, exist_ok=True)
        np.save(self.folder / f"part-{i}-offsets.npy", sets.offsets)
        np.save(self.folder / f"part-{i}-elements.npy", sets.elements)
        self.ranges.append((first, first + sets.size - 1))

    def load(self, i: int) -> Membership:
        offsets = np.load(self.folder / f"part-{i}-offsets.npy")
        elements = np.load(self.folder / f"part-{i}-elements.npy")
        return Membership(pl.Series("entity", [], dtype=pl.Int64), offsets, elements, self.text_hashes)


class HeldSets:
    """All sets in memory, as one part (the usual run)."""

    def __init__(self, sets: Membership) -> None:
        self.sets = sets
        self.ranges = [(0, sets.size - 1)]

    def load(self, i: int) -> Membership:
        return self.sets

    def saved(self, folder: Path) -> PartStore:
        """The sets saved in ``folder`` as one part, so the caller can let them go (the join
        then gets their memory; verification loads them again)."""
        store = PartStore(folder, self.sets.text_hashes)
        store.save(self.sets)
        return store


def verify_blocks(candidates: Path, store: PartStore | HeldSets, threshold: float, params: SignatureParams | None,
                  memory: int) -> pl.DataFrame:
    """Exact Jaccard of every candidate (:mod:`lshjob.index.verify`), two parts' sets held at a time;
    candidates are read a slice at a time (an eighth of the budget), so memory stays bounded
    whatever their number. ``candidates`` is the join's file (one part) or folder (parts)."""
    step = max(MIN_VERIFY_SLICE, memory // 8 // VERIFY_BYTES_PER_PAIR)
    pieces = []
    parts = len(store.ranges)
    for i in range(parts):
        left = None
        for j in range(i, parts):
            files = _block_files(candidates, parts, i, j)
            if not files:
                continue
            left = store.load(i) if left is None else left
            right = left if j == i else store.load(j)
            frame = pl.scan_parquet(files, hive_partitioning=False).select("left_rep", "right_rep", "bands_shared")
            kept = []
            for lo, hi in slice_bounds(_rows(files), step):
                chunk = frame.slice(lo, hi - lo).collect()
                kept.append(verify_between(chunk, left, store.ranges[i][0], right, store.ranges[j][0], threshold))
            block = pl.concat(kept) if kept else None
            if block is None or block.height == 0:  # no candidate here, or none reached the threshold
                continue
            if params is None:  # identical sets only, no signatures: the estimate is exact
                block = block.with_columns(estimate=pl.col("jaccard")).select(
                    "left_rep", "right_rep", "jaccard", "estimate", "bands_shared")
            else:
                block = add_estimates_between(block, left, store.ranges[i][0], right, store.ranges[j][0], params,
                                              max_bytes=memory // ESTIMATE_SHARE)
            pieces.append(block)
            del right
    return pl.concat(pieces) if pieces else empty_verified()


def empty_verified() -> pl.DataFrame:
    """No verified pair (contract of :func:`lshjob.index.verify.verify_pairs` with estimates)."""
    return pl.DataFrame(schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "jaccard": pl.Float64,
                                "estimate": pl.Float64, "bands_shared": pl.Int32})


def identical_candidates(prints: pl.DataFrame, ranges: list[tuple[int, int]], out: Path) -> tuple[Path, int]:
    """Pairs of representatives (of different parts) with the same set fingerprint, written
    split by parts as the join writes candidates: verification at threshold 1.0 keeps the
    identical ones. ``prints``: ``rep``, ``fa``, ``fb`` (:func:`lshjob.index.collapse.fingerprints`).
    A group holds at most one representative a part (identical sets within a part were
    collapsed), so every pair of a group is listed."""
    grouped = prints.with_columns(size=pl.len().over("fa", "fb")).filter(pl.col("size") > 1)
    pairs = (grouped.join(grouped, on=["fa", "fb"], suffix="_other")
             .filter(pl.col("rep") < pl.col("rep_other"))
             .select(pl.col("rep").alias("left_rep"), pl.col("rep_other").alias("right_rep"),
                     pl.lit(0, dtype=pl.Int32).alias("bands_shared")))
    firsts = np.array([a for a, _ in ranges], dtype=np.int64)
    pairs = pairs.with_columns(
        left_part=pl.Series(np.searchsorted(firsts, pairs["left_rep"].to_numpy(), side="right") - 1),
        right_part=pl.Series(np.searchsorted(firsts, pairs["right_rep"].to_numpy(), side="right") - 1),
    )
    out.mkdir(parents=True, exist_ok=True)
    for (i, j), block in pairs.group_by("left_part", "right_part"):
        folder = out / f"left_part={i}" / f"right_part={j}"
        folder.mkdir(parents=True, exist_ok=True)
        block.select("left_rep", "right_rep", "bands_shared").write_parquet(folder / "pairs.parquet")
    return out, pairs.height


def _block_files(candidates: Path, parts: int, i: int, j: int) -> list[str]:
    if parts == 1 and candidates.is_file():
        return [str(candidates)]
    return sorted(str(p) for p in (candidates / f"left_part={i}" / f"right_part={j}").glob("*.parquet"))


def _rows(files: list[str]) -> int:
    return pl.scan_parquet(files, hive_partitioning=False).select(pl.len()).collect().item()
