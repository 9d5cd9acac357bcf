"""Ingest for the run: events -> :class:`~lshjob.core.sets.ElementSets` in a streaming pass.

Same checks and same result as ``ElementSets.from_sets(load_sets(...))`` (one set per
entity), built without polars' group-by over (entity, element), which at 40 million events
costs several seconds and about 100 bytes per event:

1. a pass collects the distinct entity keys (and, for text elements, the distinct element
   keys), sorted: entity id = position of the key, element code as in
   :mod:`lshjob.core.sets`;
2. the events stream through in batches; each is turned into (entity id, element code
   [, weight]) and copied into arrays sized from the event count: 12 bytes per event
   (20 with weights);
3. a counting sort groups the codes by entity (8 more bytes per event, then the 12 are
   freed); each set is sorted and deduplicated in place, weights of repeated elements are
   summed and elements under ``--min-count`` dropped (compiled, both cores).

Peak memory is therefore about 20 bytes per event (36 with a count column or a minimum
count above 1), plus the batch polars holds and the distinct keys (text keys with a hash
table of 16 to 32 bytes a key: :mod:`lshjob.ingest.text_keys`).

Integer entity keys whose range is at most a quarter of the event count (the common case of
numbered customers) take a shorter way: one pass reads only the entity column and counts
events per key value (8 bytes per value of the range); the counts give each key its slot
range; a second pass reads the events again and writes each element code straight into its
entity's slots. No id or code array is kept: about 8 bytes per event at the peak (16 with
weights) plus 8 per key value, and step 3's sort and merge as above.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import xxh64_strings
from lshjob.core.sets import INT64_MAX, ElementSets, nfc_codes
from lshjob.errors import InputError, ParameterError, key_text
from lshjob.ingest import grouping
from lshjob.ingest.spec import EventSpec, IngestReport, validated_events
from lshjob.ingest.text_keys import TextPositions
from lshjob.runtime import budget
from lshjob.runtime.partitions import EntitySelection, events_per_entity

BATCH_ROWS = 1_000_000  # as fast as 4M here, and a quarter of the memory in flight (measured)
# bytes an event and the key range's table: lshjob.runtime.budget (grouping_bytes, dense_span)


def load_membership(source: str | Path, spec: EventSpec, memory: int | None = None) -> tuple[ElementSets, IngestReport]:
    """Read events into a ElementSets (entities in sorted key order); see the module docstring.

    With ``memory`` (bytes), refuse before reading when grouping the events would need more."""
    events = open_events(source, spec)
    check_budget(events, None, memory)
    return membership_of(events, None)


def membership_of(events: EventSource, selection: EntitySelection | None) -> tuple[ElementSets, IngestReport]:
    """The sets of the selected entities (all by default), entities in sorted key order."""
    grouped = read_and_group(events, selection)
    keys, offsets, elements, report, where = grouped.keys, grouped.offsets, grouped.codes, grouped.report, grouped.where
    sizes = grouping.sort_and_merge(offsets, elements, grouped.weights, float(events.min_count), grouped.weighted)
    offsets, elements = grouping.compact(offsets, elements, sizes)
    empty = sizes == 0
    if empty.all() and selection is None:
        raise InputError(
            f"{where}: no element is left after filtering (--min-count {events.min_count}); nothing to sign"
        )
    if empty.any():
        report.empty_after_filter = int(empty.sum())
        emptied = keys.filter(pl.Series(empty)).head(5)
        report.empty_examples = (events.describe(emptied) if events.describe is not None
                                 else [key_text((k,)) for k in emptied.to_list()])
        keys = keys.filter(pl.Series(~empty))
        offsets = np.concatenate([[0], offsets[1:][~empty]])
    report.membership_rows = int(len(elements))
    report.sets = len(keys)
    return ElementSets(keys.alias("entity"), offsets, elements, grouped.text_hashes), report


@dataclass
class GroupedEvents:
    """Events grouped by entity, not yet sorted or deduplicated within a set: the codes of
    entity ``keys[g]`` are ``codes[offsets[g]:offsets[g + 1]]`` (``weights`` beside them when
    ``weighted``); ``text_hashes`` as in :class:`~lshjob.core.sets.ElementSets`."""

    keys: pl.Series
    offsets: np.ndarray
    codes: np.ndarray
    weights: np.ndarray
    weighted: bool
    text_hashes: np.ndarray | None
    report: IngestReport
    where: str


@dataclass
class EventSource:
    """Checked events, ready to be grouped whole or a selection of entities at a time: the
    lazy frame of :func:`~lshjob.ingest.spec.validated_events`, its report, and what every
    selection shares (the text element dictionary, so codes agree across selections)."""

    frame: pl.LazyFrame
    report: IngestReport
    where: str
    weighted: bool
    min_count: float
    dictionary: pl.Series | None
    text_hashes: np.ndarray | None
    # keys as reports show them (composite keys decoded: lshjob.ingest.keyed); default (key,)
    describe: Callable[[pl.Series], list[str]] | None = None
    # code of each dictionary entry when texts of one NFC form are one element, else None
    remap: np.ndarray | None = None
    # each text element's position in the dictionary (built once, shared by the selections)
    positions: TextPositions | None = None

    @property
    def events(self) -> int:
        """Events left after dropping rows with null keys."""
        return self.report.rows_read - self.report.null_rows_dropped


def open_events(source: str | Path, spec: EventSpec) -> EventSource:
    """Check the events (one set per entity) and prepare what grouping them needs."""
    if spec.key_columns != ["entity"]:
        raise ParameterError("load_membership builds one set per entity; segments and periods go through load_sets")
    warming = start_compiled_code()
    try:
        frame, report, where = validated_events(source, spec)
        with report.reading(where):
            dictionary = _checked_dictionary(frame, where)
    finally:  # also when the input is refused: the caller may go on to compiled calls
        warming.join()  # before any compiled call: one threading layer (workqueue) must not be entered twice at once
    return _source(frame, report, where, spec, dictionary, None)


def event_source(frame: pl.LazyFrame, report: IngestReport, where: str, spec: EventSpec,
                 describe: Callable[[pl.Series], list[str]] | None = None) -> EventSource:
    """An EventSource over checked events whose ``entity`` column is already one integer key
    per set (:mod:`lshjob.ingest.keyed`); ``describe`` shows keys in reports."""
    with report.reading(where):
        dictionary = _checked_dictionary(frame, where)
    return _source(frame, report, where, spec, dictionary, describe)


def _checked_dictionary(frame: pl.LazyFrame, where: str) -> pl.Series | None:
    dictionary = _text_dictionary(frame)
    if dictionary is not None:
        _check_no_nulls(dictionary.to_frame(), where)
    return dictionary


def _source(frame, report, where, spec, dictionary, describe) -> EventSource:
    weighted = spec.count is not None or spec.min_count > 1
    canonical, remap = (dictionary, None) if dictionary is None or spec.unicode != "nfc" else nfc_codes(dictionary)
    text_hashes = None if dictionary is None else xxh64_strings(canonical)
    positions = None if dictionary is None else TextPositions(dictionary)
    return EventSource(frame, report, where, weighted, float(spec.min_count), dictionary, text_hashes, describe, remap,
                       positions)


def check_budget(events: EventSource, selection: EntitySelection | None, memory: int | None) -> None:
    """Refuse, with the figures, when grouping the selection would need more than ``memory``."""
    n, entity_range = _extent(events, selection)
    span = budget.dense_span(entity_range, n)
    need = budget.grouping_bytes(n, events.weighted, span)
    if memory is not None and need > memory:
        per_event = (budget.BYTES_PER_EVENT_IN_RANGE if span else budget.BYTES_PER_EVENT)[events.weighted]
        raise ParameterError(
            f"{events.where}: grouping {n:,} events into sets needs about {need / 2**30:.1f} GiB "
            f"({per_event} bytes an event), more "
            f"than the memory budget of {memory / 2**30:.1f} GiB; raise --memory, or split the input by "
            "entity and run each part"
        )


def grouping_need(events: EventSource, selection: EntitySelection | None = None) -> int:
    """Bytes the loader needs at its peak to group the selection (all events by default)."""
    n, entity_range = _extent(events, selection)
    return budget.grouping_bytes(n, events.weighted, budget.dense_span(entity_range, n))


def event_bytes(events: EventSource) -> float:
    """Grouping cost of one of the events (:func:`lshjob.runtime.budget.bytes_per_event`)."""
    return budget.bytes_per_event(events.events, events.weighted, events.report.entity_range)


def entity_counts(events: EventSource) -> pl.DataFrame:
    """Events per entity key (:func:`lshjob.runtime.partitions.events_per_entity`), one
    streaming pass; a file failing to read is named."""
    with events.report.reading(events.where):
        return events_per_entity(events.frame)


def _extent(events: EventSource, selection: EntitySelection | None) -> tuple[int, tuple[int, int] | None]:
    if selection is None:
        return events.events, events.report.entity_range
    return selection.events, selection.entity_range


def read_grouped(source: str | Path, spec: EventSpec, memory: int | None = None) -> GroupedEvents:
    """Steps 1-3 of the module docstring up to the counting sort (one set per entity)."""
    events = open_events(source, spec)
    check_budget(events, None, memory)
    return read_and_group(events, None)


def read_and_group(events: EventSource, selection: EntitySelection | None) -> GroupedEvents:
    """Group the selected entities' events (all by default) up to the counting sort."""
    frame, where = events.frame, events.where
    n, entity_range = _extent(events, selection)
    report = events.report
    if selection is not None:
        frame = frame.filter(selection.condition)
        report = IngestReport(files=report.files, rows_read=n, entity_range=entity_range)
    span = budget.dense_span(entity_range, n)
    codes = (events.positions, events.remap)
    with events.report.reading(where):
        if span:
            keys, offsets, elements, kept_weights = _read_in_range(
                frame, entity_range[0], span, n, events.weighted, codes, where,
                None if selection is None else selection.key_counts)
        else:
            keys, offsets, elements, kept_weights = _read_and_group(frame, n, events.weighted, codes, where)
    return GroupedEvents(keys.alias("entity"), offsets, elements, kept_weights, events.weighted,
                         events.text_hashes, report, where)


def _codes(element: pl.Series, dictionary: tuple[TextPositions | None, np.ndarray | None], where: str) -> np.ndarray:
    """Element codes of a batch (:mod:`lshjob.core.sets`); ``dictionary``: the positions among
    the sorted distinct texts (:mod:`lshjob.ingest.text_keys`) and, when some are one NFC
    form, their codes."""
    texts, remap = dictionary
    if texts is None:
        return element.cast(pl.Int64).to_numpy()
    found = texts(element)
    if len(found) and found.min() < 0:
        raise InputError(f"{where}: the files changed while being read (an element key the first pass did not see)")
    return found if remap is None else remap[found]


def _read_in_range(frame, first, span, n, weighted, dictionary, where, known=None):
    """The two-pass way for integer keys in a small range (module docstring); with ``known``
    (keys and their event counts, counted beforehand) the counting pass is skipped."""
    slots = np.zeros(span, dtype=np.int64)
    shares = 1 << (numba.get_num_threads().bit_length() - 1)  # a power of two: shares by bit mask
    if known is not None:
        k = known[0] if known[0].dtype in (np.int64, np.uint64) else known[0].astype(np.int64)
        slots[(k - k.dtype.type(first)).astype(np.int64)] = known[1]  # keys within the range: no overflow
    else:
        outside = 0
        for batch in batches(frame, ["entity"]):
            _check_no_nulls(batch, where)
            v = _wide(batch["entity"])
            outside += grouping.count_keys(slots, v, v.dtype.type(first), v.dtype.type(first + span - 1), shares)
        if outside:
            raise InputError(f"{where}: the files changed while being read "
                             f"({outside} keys outside the range first seen)")
    counted = int(slots.sum())
    present = np.flatnonzero(slots)
    offsets = np.zeros(len(present) + 1, dtype=np.int64)
    np.cumsum(slots[present], out=offsets[1:])
    slots[:] = -1  # a key value not counted in the first pass
    slots[present] = offsets[:-1]  # now: where the next event of each key value goes
    elements = np.empty(counted, dtype=np.int64)
    kept_weights = np.empty(counted if weighted else 0, dtype=np.float64)
    no_weights = np.empty(0, dtype=np.float64)
    misplaced = 0
    columns = ["entity", "element", "weight"] if weighted else ["entity", "element"]
    for batch in batches(frame, columns):
        _check_no_nulls(batch, where)
        v = _wide(batch["entity"])
        w = batch["weight"].to_numpy() if weighted else no_weights
        misplaced += grouping.place_codes(slots, v, v.dtype.type(first), v.dtype.type(first + span - 1),
                            _codes(batch["element"], dictionary, where), w, elements, kept_weights, shares)
    if misplaced or counted != n or not np.array_equal(slots[present], offsets[1:]):
        raise InputError(f"{where}: the files changed while being read ({n} events counted, then read again)")
    dtype = frame.collect_schema()["entity"]
    values = present.astype(np.uint64) + np.uint64(first) if dtype == pl.UInt64 else present + first  # 2**63 and up
    return pl.Series("entity", values, dtype=dtype), offsets, elements, kept_weights


def batches(frame: pl.LazyFrame, columns: list[str]) -> Iterator[pl.DataFrame]:
    """The columns of ``frame``, streamed in batches of up to BATCH_ROWS rows, each cut where
    its columns' chunks end, so that ``to_numpy`` is a view and not a copy (a batch of 1M
    rows came in 9-10 chunks of the Parquet row groups; copying them cost about 0.1 s a pass
    over 40M events, measured). Columns chunked differently come whole (and are copied)."""
    for batch in frame.select(columns).collect_batches(chunk_size=BATCH_ROWS, maintain_order=False):
        lengths = [len(chunk) for chunk in batch.get_column(columns[0]).get_chunks()]
        if len(lengths) == 1 or any([len(chunk) for chunk in batch.get_column(name).get_chunks()] != lengths
                                    for name in columns[1:]):
            yield batch
            continue
        start = 0
        for length in lengths:
            yield batch.slice(start, length)
            start += length


def _check_no_nulls(batch: pl.DataFrame, where: str) -> None:
    """Nulls were dropped or refused before; one here means the files' statistics were wrong
    (the statistics pass may trust the Parquet footers) or the files changed."""
    for name in batch.columns:
        if name in ("entity", "element") and batch[name].null_count():
            raise InputError(f"{where}: the {name} column holds null values that the files' statistics or the "
                             "first pass did not show; the files changed or state wrong null counts")


def _wide(values: pl.Series) -> np.ndarray:
    """Integer keys as int64 (uint64 kept): differences of narrower types could overflow."""
    v = values.to_numpy()
    return v if v.dtype in (np.int64, np.uint64) else v.astype(np.int64)


def _read_and_group(frame, n, weighted, dictionary, where):
    """Steps 1-3 of the module docstring up to the counting sort."""
    keys = frame.select(pl.col("entity").unique()).collect(engine="streaming")["entity"].sort()
    ids = np.empty(n, dtype=np.uint32 if len(keys) < 2**32 else np.int64)
    positions = grouping.key_positions(keys)
    codes = np.empty(n, dtype=np.int64)
    weights = np.empty(n if weighted else 0, dtype=np.float64)
    pos = 0
    columns = ["entity", "element", "weight"] if weighted else ["entity", "element"]
    for batch in batches(frame, columns):
        _check_no_nulls(batch, where)
        m = batch.height
        if pos + m > n:
            raise InputError(f"{where}: the files changed while being read ({n} events counted, more read)")
        found = positions(batch["entity"])
        if m and (found.min() < 0 or found.max() >= len(keys)):
            raise InputError(f"{where}: the files changed while being read (an entity key the first pass did not see)")
        ids[pos:pos + m] = found
        codes[pos:pos + m] = _codes(batch["element"], dictionary, where)
        if weighted:
            weights[pos:pos + m] = batch["weight"].to_numpy()
        pos += m
    if pos != n:
        raise InputError(f"{where}: the files changed while being read ({n} events counted, {pos} read)")
    offsets, elements, kept_weights = grouping.group_by_entity(ids, codes, weights, len(keys), numba.get_num_threads())
    return keys, offsets, elements, kept_weights


def start_compiled_code() -> threading.Thread:
    """Start numba's parallel runtime in a background thread. Its first parallel call in a
    process costs about 0.3 s of Python work (typing registries, thread pool); done while
    polars checks the events (which releases the GIL), it is mostly hidden. The caller must
    join the thread before its own first compiled call: numba's ``workqueue`` threading
    layer aborts the process when two threads run parallel code at once."""
    thread = threading.Thread(
        target=grouping.lookup, args=(np.zeros(1, np.int64), 0, np.zeros(1, np.int64)), daemon=True
    )
    thread.start()
    return thread


def _text_dictionary(frame: pl.LazyFrame) -> pl.Series | None:
    """Sorted distinct element keys as text, or None when the keys are integers that fit int64."""
    dtype = frame.collect_schema()["element"]
    if dtype.is_integer():
        if dtype != pl.UInt64 or frame.select(pl.col("element").max()).collect().item() <= INT64_MAX:
            return None
    text = pl.col("element").cast(pl.String)
    return frame.select(text.unique()).collect(engine="streaming")["element"].sort()
