"""Postings of the elements a sample holds, from every set: what pairing sampled entities
with all entities reads (:mod:`lshjob.plan.similarity`, :mod:`lshjob.audit.check`).

Wanted element codes are found through a bitmap of their multiplicative hashes, which rules
out most of the others, then an open-addressing table (linear probing, at most half full)
that gives their position among the wanted codes.
"""

from __future__ import annotations

import numpy as np

from lshjob.core import hashing
from lshjob.core._jit import numba

GOLDEN = np.uint64(hashing.GOLDEN)  # odd: multiplicative hashing of codes to bitmap bits and slots


@numba.njit(parallel=True, cache=True)
def restricted(offsets, elements, wanted):
    """:func:`lshjob.plan.similarity.restricted_index` in two passes, both cores: count each
    set's wanted elements, then write the dense ids of the sets that hold any.
    Most elements of flat data are not wanted (0.3M of 40M at 1M): a bitmap of the wanted
    codes' multiplicative hashes (16 bits or more per wanted code, so a few percent of the
    rest pass) rules them out. On long-tailed data most are (9.6M of 14.4M at 1M: the
    popular elements): an open-addressing table of the wanted codes (linear probing, at most
    half full) gives their dense ids in about one probe, where a binary search in ``wanted``
    took fourteen."""
    bitmap, shift, keys, ids, slot_shift = _wanted_table(wanted)
    n = len(offsets) - 1
    counts = np.zeros(n + 1, dtype=np.int64)
    for i in numba.prange(n):
        c = 0
        for j in range(offsets[i], offsets[i + 1]):
            if _wanted_id(elements[j], bitmap, shift, keys, ids, slot_shift) >= 0:
                c += 1
        counts[i + 1] = c
    kept = np.cumsum(counts)
    dense = np.empty(kept[-1], dtype=np.int64)
    for i in numba.prange(n):
        at = kept[i]
        if kept[i + 1] == at:  # most sets hold no wanted element: not read again
            continue
        for j in range(offsets[i], offsets[i + 1]):
            p = _wanted_id(elements[j], bitmap, shift, keys, ids, slot_shift)
            if p >= 0:
                dense[at] = p
                at += 1
    return kept, dense


@numba.njit(inline="always")
def _wanted_id(x, bitmap, shift, keys, ids, slot_shift):
    """Position of ``x`` in the wanted codes, or -1."""
    h = (np.uint64(x) * GOLDEN) >> shift
    if not (bitmap[h >> np.uint64(6)] >> (h & np.uint64(63))) & np.uint64(1):
        return -1
    last = len(ids) - 1
    t = np.int64((np.uint64(x) * GOLDEN) >> slot_shift)
    while ids[t] >= 0:
        if keys[t] == x:
            return ids[t]
        t = (t + 1) & last
    return -1


@numba.njit(cache=True)
def _wanted_table(wanted):
    """The bitmap (16 bits or more per wanted code) and the open-addressing table (twice as
    many slots as codes or more) of the wanted codes."""
    bits = 6
    while (1 << bits) < 16 * len(wanted):
        bits += 1
    shift = np.uint64(64 - bits)
    bitmap = np.zeros(1 << (bits - 6), dtype=np.uint64)
    slot_bits = 1
    while (1 << slot_bits) < 2 * len(wanted):
        slot_bits += 1
    slot_shift = np.uint64(64 - slot_bits)
    keys = np.zeros(1 << slot_bits, dtype=np.int64)
    ids = np.full(1 << slot_bits, -1, dtype=np.int64)
    for p in range(len(wanted)):
        x = wanted[p]
        h = (np.uint64(x) * GOLDEN) >> shift
        bitmap[h >> np.uint64(6)] |= np.uint64(1) << (h & np.uint64(63))
        t = np.int64((np.uint64(x) * GOLDEN) >> slot_shift)
        while ids[t] >= 0:
            t = (t + 1) & ((1 << slot_bits) - 1)
        keys[t] = x
        ids[t] = p
    return bitmap, shift, keys, ids, slot_shift


def wanted_postings(offsets: np.ndarray, elements: np.ndarray, wanted: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverted index of the sorted ``wanted`` codes over every set: the entities holding
    ``wanted[p]`` are ``members[starts[p]:starts[p + 1]]``, ascending; members int32 when the
    entity ids fit. Built straight from the sets, without a restricted copy of them."""
    n = len(offsets) - 1
    chunks = max(1, min(2 * numba.get_num_threads(), n))
    cuts = np.searchsorted(offsets, np.linspace(0, offsets[-1], chunks + 1), "left")
    cuts[0], cuts[-1] = 0, n
    template = np.empty(0, dtype=np.int32 if n < 2**31 else np.int64)
    return _wanted_postings(offsets, elements, wanted, np.maximum.accumulate(cuts), template)


@numba.njit(parallel=True, cache=True)
def _wanted_postings(offsets, elements, wanted, cuts, template):
    """Two passes over the sets, a range of entities a chunk: count each wanted code per
    chunk, then write each chunk's entities at its own place in every posting list (the
    chunks in entity order, so each list stays ascending)."""
    bitmap, shift, keys, ids, slot_shift = _wanted_table(wanted)
    chunks = len(cuts) - 1
    per_chunk = np.zeros((chunks, len(wanted)), dtype=np.int64)
    holds = np.zeros(len(offsets) - 1, dtype=np.bool_)  # sets holding none are not read again
    for c in numba.prange(chunks):
        for i in range(cuts[c], cuts[c + 1]):
            for j in range(offsets[i], offsets[i + 1]):
                p = _wanted_id(elements[j], bitmap, shift, keys, ids, slot_shift)
                if p >= 0:
                    per_chunk[c, p] += 1
                    holds[i] = True
    starts = np.zeros(len(wanted) + 1, dtype=np.int64)
    for p in range(len(wanted)):
        at = starts[p]
        for c in range(chunks):
            held = per_chunk[c, p]
            per_chunk[c, p] = at  # where chunk c writes its holders of p
            at += held
        starts[p + 1] = at
    members = np.empty(starts[-1], dtype=template.dtype)
    for c in numba.prange(chunks):
        fill = per_chunk[c]
        for i in range(cuts[c], cuts[c + 1]):
            if not holds[i]:
                continue
            for j in range(offsets[i], offsets[i + 1]):
                p = _wanted_id(elements[j], bitmap, shift, keys, ids, slot_shift)
                if p >= 0:
                    members[fill[p]] = i
                    fill[p] += 1
    return starts, members
