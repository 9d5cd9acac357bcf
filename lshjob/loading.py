"""Ingest for the run: events -> :class:`~lshjob.membership.Membership` in a streaming pass.

Same checks and same result as ``Membership.from_sets(load_sets(...))`` (one set per
entity), built without polars' group-by over (entity, element), which at 40 million events
costs several seconds and about 100 bytes per event:

1. a pass collects the distinct entity keys (and, for text elements, the distinct element
   keys), sorted: entity id = position of the key, element code as in
   :mod:`lshjob.membership`. Integer entity keys whose range is at most a quarter of the
   event count skip this pass: each event keeps its key minus the smallest key, and after
   reading, a table over the range (5 bytes per key value) turns those into positions;
2. the events stream through in batches; each is turned into (entity id, element code
   [, weight]) and copied into arrays sized from the event count: 12 bytes per event
   (20 with weights);
3. a counting sort groups the codes by entity (8 more bytes per event, then the 12 are
   freed); each set is sorted and deduplicated in place, weights of repeated elements are
   summed and elements under ``--min-count`` dropped (compiled, both cores).

Peak memory is therefore about 20 bytes per event (36 with a count column or a minimum
count above 1), plus the batch polars holds and the distinct keys.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from pathlib import Path

import numba
import numpy as np
import polars as pl

from .errors import InputError, ParameterError
from .hashing import xxh64_strings
from .ingest import EventSpec, IngestReport, validated_events
from .membership import INT64_MAX, Membership

BATCH_ROWS = 4_000_000
BYTES_PER_EVENT = {False: 20, True: 36}  # id + code + grouped code (+ weights, twice)


def grouping_bytes(events: int, weighted: bool) -> int:
    """Memory the loader needs at its peak for this many events (module docstring)."""
    return events * BYTES_PER_EVENT[weighted]


def load_membership(source: str | Path, spec: EventSpec, memory: int | None = None) -> tuple[Membership, IngestReport]:
    """Read events into a Membership (entities in sorted key order); see the module docstring.

    With ``memory`` (bytes), refuse before reading when grouping the events would need more."""
    grouped = read_grouped(source, spec, memory)
    keys, offsets, elements, report, where = grouped.keys, grouped.offsets, grouped.codes, grouped.report, grouped.where
    sizes = _sort_and_merge(offsets, elements, grouped.weights, float(spec.min_count), grouped.weighted)
    offsets, elements = _compact(offsets, elements, sizes)
    empty = sizes == 0
    if empty.all():
        raise InputError(
            f"{where}: no element is left after filtering (--min-count {spec.min_count}); nothing to sign"
        )
    if empty.any():
        report.empty_after_filter = int(empty.sum())
        report.empty_examples = [str((k,)) for k in keys.filter(pl.Series(empty)).head(5).to_list()]
        keys = keys.filter(pl.Series(~empty))
        offsets = np.concatenate([[0], offsets[1:][~empty]])
    report.membership_rows = int(len(elements))
    report.sets = len(keys)
    return Membership(keys.alias("entity"), offsets, elements, grouped.text_hashes), report


@dataclass
class GroupedEvents:
    """Events grouped by entity, not yet sorted or deduplicated within a set: the codes of
    entity ``keys[g]`` are ``codes[offsets[g]:offsets[g + 1]]`` (``weights`` beside them when
    ``weighted``); ``text_hashes`` as in :class:`~lshjob.membership.Membership`."""

    keys: pl.Series
    offsets: np.ndarray
    codes: np.ndarray
    weights: np.ndarray
    weighted: bool
    text_hashes: np.ndarray | None
    report: IngestReport
    where: str


def read_grouped(source: str | Path, spec: EventSpec, memory: int | None = None) -> GroupedEvents:
    """Steps 1-3 of the module docstring up to the counting sort (one set per entity)."""
    if spec.key_columns != ["entity"]:
        raise ParameterError("load_membership builds one set per entity; segments and periods go through load_sets")
    start_compiled_code()
    frame, report, where = validated_events(source, spec)
    weighted = spec.count is not None or spec.min_count > 1
    n = report.rows_read - report.null_rows_dropped
    span = _dense_span(report.entity_range, n)
    need = grouping_bytes(n, weighted) + 5 * span
    if memory is not None and need > memory:
        raise ParameterError(
            f"{where}: grouping {report.rows_read:,} events into sets needs about {need / 2**30:.1f} GiB "
            f"({BYTES_PER_EVENT[weighted]} bytes an event), more than the memory budget of "
            f"{memory / 2**30:.1f} GiB; raise --memory, or split the input by entity and run each part"
        )
    if span:  # integer keys in a small range: positions are found after reading
        first = report.entity_range[0]
        ids = np.empty(n, dtype=np.uint32)

        def positions(values: pl.Series) -> np.ndarray:
            return values.to_numpy() - first
    else:
        keys = frame.select(pl.col("entity").unique()).collect(engine="streaming")["entity"].sort()
        ids = np.empty(n, dtype=np.uint32 if len(keys) < 2**32 else np.int64)
        positions = _key_positions(keys)
    dictionary = _text_dictionary(frame)
    codes = np.empty(n, dtype=np.int64)
    weights = np.empty(n if weighted else 0, dtype=np.float64)
    pos = 0
    try:
        for batch in frame.collect_batches(chunk_size=BATCH_ROWS, maintain_order=False):
            m = batch.height
            ids[pos:pos + m] = positions(batch["entity"])
            element = batch["element"]
            if dictionary is None:
                codes[pos:pos + m] = element.cast(pl.Int64).to_numpy()
            else:
                codes[pos:pos + m] = dictionary.search_sorted(element.cast(pl.String)).to_numpy()
            if weighted:
                weights[pos:pos + m] = batch["weight"].to_numpy()
            pos += m
    except pl.exceptions.PolarsError as exc:
        raise InputError(f"{where}: could not read the events: {exc}") from exc
    if pos != n:
        raise InputError(f"{where}: the files changed while being read ({n} events counted, {pos} read)")
    if span:
        present = _rank_in_place(ids, span)
        keys = pl.Series("entity", present + first, dtype=frame.collect_schema()["entity"])
    offsets, elements, kept_weights = _group_by_entity(ids, codes, weights, len(keys), numba.get_num_threads())
    del ids, codes, weights
    text_hashes = None if dictionary is None else xxh64_strings(dictionary)
    return GroupedEvents(keys.alias("entity"), offsets, elements, kept_weights, weighted, text_hashes, report, where)


def start_compiled_code() -> threading.Thread:
    """Start numba's parallel runtime in a background thread. Its first parallel call in a
    process costs about 0.3 s of Python work (typing registries, thread pool); done while
    polars reads the events (which releases the GIL), it is mostly hidden."""
    thread = threading.Thread(
        target=_lookup, args=(np.zeros(1, np.int64), 0, np.zeros(1, np.int64)), daemon=True
    )
    thread.start()
    return thread


def _dense_span(entity_range: tuple[int, int] | None, events: int) -> int:
    """Size of the table over the integer key range when the single-pass path applies, else 0."""
    if entity_range is None:
        return 0
    span = entity_range[1] - entity_range[0] + 1
    return span if span <= max(events // 4, DENSE_MIN_SPAN) and span < 2**32 else 0


DENSE_MIN_SPAN = 1 << 16  # a table this small (320 KiB) is always worth it


@numba.njit(parallel=True, cache=True)
def _rank_in_place(ids, span):
    """``ids`` hold key - smallest key; replace each by the rank of its key among the keys
    present, and return the present offsets (sorted)."""
    seen = np.zeros(span, dtype=np.bool_)
    for j in range(len(ids)):  # a byte store per event; racing threads would write the same value
        seen[ids[j]] = True
    rank = np.empty(span, dtype=np.uint32)
    present = np.empty(span, dtype=np.int64)
    r = 0
    for v in range(span):
        rank[v] = r
        if seen[v]:
            present[r] = v
            r += 1
    for j in numba.prange(len(ids)):
        ids[j] = rank[ids[j]]
    return present[:r]


def _key_positions(keys: pl.Series):
    """A function mapping a batch of entity keys to their positions in the sorted ``keys``
    (every value is a key). Dense-ish integer keys use a direct table built once."""
    if keys.dtype.is_integer() and len(keys):
        k = keys.to_numpy().astype(np.int64)
        span = int(k[-1]) - int(k[0])
        if span < DIRECT_TABLE_FACTOR * len(k):
            table = np.full(span + 1, -1, dtype=np.int64)
            table[k - k[0]] = np.arange(len(k))
            return lambda values: _lookup(table, k[0], values.to_numpy().astype(np.int64, copy=False))
        return lambda values: _search_sorted(k, values.to_numpy().astype(np.int64, copy=False))
    return lambda values: keys.search_sorted(values).to_numpy()


DIRECT_TABLE_FACTOR = 4


@numba.njit(parallel=True, cache=True)
def _lookup(table, first, values):
    out = np.empty(len(values), dtype=np.int64)
    for j in numba.prange(len(values)):
        out[j] = table[values[j] - first]
    return out


@numba.njit(parallel=True, cache=True)
def _search_sorted(keys, values):
    out = np.empty(len(values), dtype=np.int64)
    chunks = max(1, min(len(values) // 65536, 64))
    for c in numba.prange(chunks):
        lo = c * len(values) // chunks
        hi = (c + 1) * len(values) // chunks
        out[lo:hi] = np.searchsorted(keys, values[lo:hi])
    return out


def _text_dictionary(frame: pl.LazyFrame) -> pl.Series | None:
    """Sorted distinct element keys as text, or None when the keys are integers that fit int64."""
    dtype = frame.collect_schema()["element"]
    if dtype.is_integer():
        if dtype != pl.UInt64 or frame.select(pl.col("element").max()).collect().item() <= INT64_MAX:
            return None
    text = pl.col("element").cast(pl.String)
    return frame.select(text.unique()).collect(engine="streaming")["element"].sort()


@numba.njit(parallel=True, cache=True)
def _group_by_entity(ids, codes, weights, n_keys, shares):
    """Counting sort of the events by entity id: (offsets, codes, weights) grouped.

    Parallel: each thread counts its share of the events per entity, the counts give each
    (entity, share) its own output range, and each thread scatters its share there."""
    n = len(codes)
    counts = np.zeros((shares, n_keys), dtype=np.int64)
    for s in numba.prange(shares):
        for j in range(s * n // shares, (s + 1) * n // shares):
            counts[s, ids[j]] += 1
    offsets = np.zeros(n_keys + 1, dtype=np.int64)
    for g in range(n_keys):
        total = offsets[g]
        for s in range(shares):
            c = counts[s, g]
            counts[s, g] = total  # now: where share s writes entity g
            total += c
        offsets[g + 1] = total
    out = np.empty(n, dtype=np.int64)
    out_w = np.empty(len(weights), dtype=np.float64)
    weighted = len(weights) > 0
    for s in numba.prange(shares):
        fill = counts[s]
        for j in range(s * n // shares, (s + 1) * n // shares):
            g = ids[j]
            out[fill[g]] = codes[j]
            if weighted:
                out_w[fill[g]] = weights[j]
            fill[g] += 1
    return offsets, out, out_w


@numba.njit(parallel=True, cache=True)
def _sort_and_merge(offsets, elements, weights, min_count, weighted):
    """Sort each set, merge repeats (summing weights), drop elements under min_count;
    the kept elements move to the front of the set's slot. Returns the new sizes."""
    n = len(offsets) - 1
    sizes = np.zeros(n, dtype=np.int64)
    for g in numba.prange(n):
        a, b = offsets[g], offsets[g + 1]
        if b == a:
            continue
        if weighted:
            order = np.argsort(elements[a:b], kind="mergesort")
            seg = elements[a:b][order]
            w = weights[a:b][order]
            out = a
            i = 0
            while i < b - a:
                total = w[i]
                j = i + 1
                while j < b - a and seg[j] == seg[i]:
                    total += w[j]
                    j += 1
                if total >= min_count:
                    elements[out] = seg[i]
                    out += 1
                i = j
            sizes[g] = out - a
        else:
            elements[a:b].sort()
            out = a + 1
            for j in range(a + 1, b):
                if elements[j] != elements[out - 1]:
                    elements[out] = elements[j]
                    out += 1
            sizes[g] = out - a
    return sizes


@numba.njit(cache=True)
def _compact(offsets, elements, sizes):
    """Each set's kept elements, without gaps: (new offsets, elements), moved left in place
    and returned as a view (no new array: at 10M entities a fresh 3 GB array cost more in
    first-touch page faults than the serial move)."""
    n = len(offsets) - 1
    new_offsets = np.zeros(n + 1, dtype=np.int64)
    for g in range(n):
        new_offsets[g + 1] = new_offsets[g] + sizes[g]
    if new_offsets[n] == offsets[n] - offsets[0]:
        return new_offsets, elements
    for g in range(n):
        a, t = offsets[g], new_offsets[g]
        for j in range(sizes[g]):
            elements[t + j] = elements[a + j]
    return new_offsets, elements[: new_offsets[n]]
