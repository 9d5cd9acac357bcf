"""Runs whose sets do not fit the memory budget: the entities a key range at a time.

When grouping every event at once would take more than half the budget, the run cuts the
entities, in key order, into consecutive key ranges (*parts*) of about equal grouping cost,
each within what is left of the budget (:func:`lshjob.runtime.partitions.key_ranges`, sized
by :class:`lshjob.runtime.budget.Budget`). Then, a part at a time:

1. its events are read (a filtered pass over the input; for integer keys in a small range
   the counts of the counting pass give each key its slots, :mod:`lshjob.ingest.loading`) and
   grouped into sets;
2. identical sets are collapsed within the part (:mod:`lshjob.index.collapse`);
3. its representatives are signed and their bucket keys saved to the work folder (8 bytes
   a band and representative; :func:`lshjob.index.band.save_keys`);
4. its sets are saved to the work folder (:class:`~lshjob.runtime.partitions.PartStore`) and dropped.

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

from pathlib import Path

import numpy as np
import polars as pl

from lshjob.contracts.tables import VERIFIED
from lshjob.ingest.loading import EventSource, entity_counts, event_bytes, grouping_need
from lshjob.runtime import budget
from lshjob.runtime.budget import Budget
from lshjob.runtime.partitions import EntitySelection, HeldSets, PartStore, events_per_entity, key_ranges
from lshjob.sign.signatures import SignatureParams
from lshjob.index.verify import add_estimates_between, verify_between


def signing_ranges(events: EventSource, perms: int, memory: int, parts: int | None = None) -> list[EntitySelection] | None:
    """Key ranges for ``lshjob sign`` when the events' sets need more than half of what the
    signature slices in flight to the writer leave of the budget; None when one part will do.
    The signatures themselves are made and written a slice at a time, so each entity costs
    only its key, set size and list offsets (:func:`lshjob.runtime.budget.signing_need`)
    beside its events. The entities are counted (one more pass) only when a bound says they
    might not fit."""
    limit = Budget(memory, parts)
    reserve = budget.writer_reserve(perms)
    grouping = grouping_need(events)
    span = budget.dense_span(events.report.entity_range, events.events) or events.events
    if limit.one_part(budget.signing_need(grouping, min(events.events, span)), reserve):
        return None
    counts = entity_counts(events)
    if limit.one_part(budget.signing_need(grouping, counts.height), reserve):
        return None
    limit.require_copy(f"{events.where}: the sets", "signing")
    return key_ranges(counts, limit.range_bytes(counts.height, budget.SIGN_PART_SHARE, reserve), parts,
                      event_bytes=event_bytes(events), bytes_per_entity=budget.SIGNATURE_BYTES_PER_ENTITY)


def keyed_signing_ranges(frame: pl.LazyFrame, events: int, where: str, perms: int, memory: int,
                         parts: int | None = None) -> list[EntitySelection] | None:
    """Key ranges of entities for ``lshjob sign`` with segments or periods of text entity keys,
    whose sets polars groups (:func:`lshjob.ingest.spec.group_events`) at about
    ``KEYED_BYTES_PER_EVENT`` (integer keys go through :mod:`lshjob.ingest.keyed`); None when
    all of them fit half of what the slices in flight to the writer leave of the budget. A
    set's key starts with its entity, so every set lies in one range, and ranges in entity
    order keep the file sorted by key."""
    limit = Budget(memory, parts)
    reserve = budget.writer_reserve(perms)
    if limit.one_part(budget.keyed_need(events), reserve):
        return None
    limit.require_copy(f"{where}: the sets", "signing")
    counts = events_per_entity(frame)
    return key_ranges(counts, limit.range_bytes(counts.height, budget.SIGN_PART_SHARE, reserve), parts,
                      event_bytes=budget.KEYED_BYTES_PER_EVENT)


def verify_blocks(candidates: Path, store: PartStore | HeldSets, threshold: float, params: SignatureParams | None,
                  memory: int) -> pl.DataFrame:
    """Exact Jaccard of every candidate (:mod:`lshjob.index.verify`), two parts' sets held at a time;
    candidates are read a slice at a time (an eighth of the budget), so memory stays bounded
    whatever their number. ``candidates`` is the join's file (one part) or folder (parts)."""
    step = Budget(memory).verify_slice_rows()
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
            for offset in range(0, _rows(files), step):
                chunk = frame.slice(offset, step).collect()
                kept.append(verify_between(chunk, left, store.ranges[i][0], right, store.ranges[j][0], threshold))
            block = pl.concat(kept) if kept else None
            if block is None or block.height == 0:  # no candidate here, or none reached the threshold
                continue
            if params is None:  # identical sets only, no signatures: the estimate is exact
                block = block.with_columns(estimate=pl.col("jaccard")).select(
                    "left_rep", "right_rep", "jaccard", "estimate", "bands_shared")
            else:
                block = add_estimates_between(block, left, store.ranges[i][0], right, store.ranges[j][0], params,
                                              max_bytes=Budget(memory).estimate_bytes())
            pieces.append(block)
            del right
    return pl.concat(pieces) if pieces else empty_verified()


def empty_verified() -> pl.DataFrame:
    """No verified pair: the VERIFIED table (:mod:`lshjob.contracts.tables`) with no row."""
    return VERIFIED.empty()


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
