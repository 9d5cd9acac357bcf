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
(:func:`lshjob.index.verify.local.verify_blocks`): P parts cost P + P(P-1)/2 loads of saved sets.

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

import polars as pl

from lshjob.ingest.loading import EventSource, entity_counts, event_bytes, grouping_need
from lshjob.runtime import budget
from lshjob.runtime.budget import Budget
from lshjob.runtime.partitions import EntitySelection, events_per_entity, key_ranges


def signing_ranges(
    events: EventSource, perms: int, memory: int, parts: int | None = None
) -> list[EntitySelection] | None:
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
    whose sets polars groups (:func:`lshjob.ingest.spec.group_set_rows`) at about
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

