"""The compiled search for shared buckets of the local band engine (:mod:`lshjob.index.band.local`)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba

PART_ROWS = 1 << 15  # keys per partition: its two bitmaps (about 8 KiB) and keys stay in cache


@numba.njit(nogil=True, cache=True)
def _shared(keys, log2_slots):
    """Positions of the keys that occur twice or more, ordered by key, then position.

    The keys are first split by their top bits into partitions of about ``PART_ROWS``
    (a stable counting sort of (key, position)), so each partition's work stays in cache:
    a bitmap at 10 million keys is 64 MB, and probing it at random cost four times as much
    (measured). In a partition, a first pass marks the keys whose top bits, down to
    ``log2_slots`` bits of the whole key, are also those of another key (two bitmaps: bits
    seen once, bits seen again; keys are fmix64 outputs, so their top bits are uniform).
    The marks are a superset of the repeated keys, a few percent of all at about 32 bits a
    key; only they are sorted to find the exact repeats."""
    n = keys.shape[0]
    part_bits = 0
    while (n >> part_bits) > PART_ROWS and part_bits < log2_slots - 12:
        part_bits += 1
    parts = 1 << part_bits
    part_shift = np.uint64(64 - part_bits) if part_bits > 0 else np.uint64(63)
    # stable counting sort by partition
    starts = np.zeros(parts + 1, dtype=np.int64)
    for key in keys:
        p = np.int64(key >> part_shift) if part_bits > 0 else 0
        starts[p + 1] += 1
    for p in range(parts):
        starts[p + 1] += starts[p]
    fill = starts[:-1].copy()
    part_keys = np.empty(n, dtype=np.uint64)
    part_pos = np.empty(n, dtype=np.int64)
    for i in range(n):
        p = np.int64(keys[i] >> part_shift) if part_bits > 0 else 0
        part_keys[fill[p]] = keys[i]
        part_pos[fill[p]] = i
        fill[p] += 1
    bits = log2_slots - part_bits  # slots per partition
    shift = np.uint64(64 - log2_slots)
    mask = np.uint64((1 << bits) - 1)
    seen = np.empty(max(1, (1 << bits) >> 6), dtype=np.uint64)
    again = np.empty(max(1, (1 << bits) >> 6), dtype=np.uint64)
    out = np.empty(n, dtype=np.int64)
    kept = 0
    largest = 0
    for p in range(parts):
        largest = max(largest, starts[p + 1] - starts[p])
    marked = np.empty(largest, dtype=np.int64)
    for p in range(parts):
        a, b = starts[p], starts[p + 1]
        seen[:] = 0
        again[:] = 0
        for i in range(a, b):
            s = (part_keys[i] >> shift) & mask
            word, bit = s >> np.uint64(6), np.uint64(1) << (s & np.uint64(63))
            if seen[word] & bit:
                again[word] |= bit
            else:
                seen[word] |= bit
        m = 0
        for i in range(a, b):
            s = (part_keys[i] >> shift) & mask
            if again[s >> np.uint64(6)] & (np.uint64(1) << (s & np.uint64(63))):
                marked[m] = i
                m += 1
        order = marked[:m][np.argsort(part_keys[marked[:m]], kind="mergesort")]  # stable: ties by position
        i = 0
        while i < m:
            j = i + 1
            while j < m and part_keys[order[j]] == part_keys[order[i]]:
                j += 1
            if j - i >= 2:
                for t in range(i, j):
                    out[kept] = part_pos[order[t]]
                    kept += 1
            i = j
    return out[:kept]
