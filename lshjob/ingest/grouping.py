"""Compiled kernels that group events into sets (used by :mod:`lshjob.ingest.loading`).

Each runs on all cores. The two-pass reader counts events per key value
(:func:`count_keys`) and writes each code straight into its entity's slots
(:func:`place_codes`); the one-pass reader maps keys to entity ids (:func:`lookup`,
:func:`search_sorted_parallel`) and groups by a counting sort (:func:`group_by_entity`).
Then every set is sorted and deduplicated in place (:func:`sort_and_merge`) and the gaps
closed (:func:`compact`).
"""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.compile_cache import readonly
from lshjob.core.search import first_at_least
from lshjob.ingest.text_keys import text_positions


def count_keys(slots, values, first, last, shares):
    """:func:`_count_keys` with ``values`` read-only (one compiled kernel per key type)."""
    return _count_keys(slots, readonly(values), first, last, shares)


def place_codes(slots, values, first, last, codes, weights, out, out_weights, shares):
    """:func:`_place_codes` with the inputs read-only (one compiled kernel per key and code
    type)."""
    return _place_codes(slots, readonly(values), first, last, readonly(codes), readonly(weights), out, out_weights,
                        shares)


@numba.njit(parallel=True, cache=True)
def _count_keys(slots, values, first, last, shares):
    """Count events per key value (share s of the threads takes the values v with
    v % shares == s, as :func:`place_codes`); returns how many values fall outside
    [first, last] (compared before subtracting, so nothing overflows)."""
    low_bits = shares - 1
    outside = np.zeros(shares, dtype=np.int64)
    for s in numba.prange(shares):
        for x in values:
            if x < first or x > last:
                outside[s] += 1
                continue
            v = x - first
            if (v & low_bits) == s:
                slots[v] += 1
    return outside[0]


@numba.njit(parallel=True, cache=True)
def _place_codes(slots, values, first, last, codes, weights, out, out_weights, shares):
    """Write each event's code (and weight) into its key's next slot. Share s of the threads
    takes the key values v with v % shares == s (shares a power of two), so no two threads
    move one slot pointer.
    Returns how many events had no slot (the files changed since they were counted)."""
    weighted = len(weights) > 0
    low_bits = shares - 1
    missed = np.zeros(shares, dtype=np.int64)
    for s in numba.prange(shares):
        for j in range(len(values)):
            if values[j] < first or values[j] > last:
                if s == 0:
                    missed[0] += 1
                continue
            v = values[j] - first
            if (v & low_bits) != s:
                continue
            at = slots[v]
            if at < 0 or at >= len(out):
                missed[s] += 1
                continue
            out[at] = codes[j]
            if weighted:
                out_weights[at] = weights[j]
            slots[v] = at + 1
    return missed.sum()


@numba.njit(parallel=True, cache=True)
def lookup(table, first, values):
    """``table[v - first]`` for each value; -1 for a value outside the table."""
    out = np.empty(len(values), dtype=np.int64)
    for j in numba.prange(len(values)):
        d = values[j] - first
        out[j] = table[d] if 0 <= d < len(table) else -1
    return out


@numba.njit(parallel=True, cache=True)
def search_sorted_parallel(keys, values):
    """The position of each value among the sorted keys; -1 for a value that is not a key."""
    out = np.empty(len(values), dtype=np.int64)
    chunks = max(1, min(len(values) // 8192, 64))
    for c in numba.prange(chunks):
        lo = c * len(values) // chunks
        hi = (c + 1) * len(values) // chunks
        out[lo:hi] = np.searchsorted(keys, values[lo:hi])
        for j in range(lo, hi):
            if out[j] >= len(keys) or keys[out[j]] != values[j]:
                out[j] = -1
    return out


@numba.njit(cache=True)
def bucket_starts(keys, shift):
    """For sorted keys: ``starts[b]`` is the first key with ``(key - keys[0]) >> shift >= b``,
    so bucket b's keys are ``keys[starts[b]:starts[b + 1]]`` (the span must fit int64)."""
    nb = ((keys[-1] - keys[0]) >> shift) + 1
    starts = np.empty(nb + 1, dtype=np.int64)
    j = 0
    for b in range(nb + 1):
        while j < len(keys) and ((keys[j] - keys[0]) >> shift) < b:
            j += 1
        starts[b] = j
    return starts


@numba.njit(parallel=True, cache=True)
def lookup_bucketed(keys, starts, shift, values):
    """The position of each value among the sorted keys (-1 for a value that is not a key)
    through :func:`bucket_starts`: one table read and a search among the few keys of one
    bucket, instead of a binary search over all the keys (with 6.6M keys, 40M lookups took
    5.4 s that way: a cache miss at every level)."""
    out = np.empty(len(values), dtype=np.int64)
    first, nb = keys[0], len(starts) - 1
    for j in numba.prange(len(values)):
        v = values[j]
        b = 0 if v < first else min((v - first) >> shift, nb - 1)
        lo = first_at_least(keys, starts[b], starts[b + 1], v)
        out[j] = lo if lo < len(keys) and keys[lo] == v else -1
    return out


@numba.njit(parallel=True, cache=True)
def group_by_entity(ids, codes, weights, n_keys, shares):
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


SIGN_BIT = np.uint64(1 << 63)


def sort_and_merge(offsets, elements, weights, min_count, weighted):
    """Sort each set, merge repeats (summing weights), drop elements under min_count;
    the kept elements move to the front of the set's slot. Returns the new sizes.
    Two kernels, so a run without weights compiles only the plain one."""
    if weighted:
        return _merge_weighted(offsets, elements, weights, min_count)
    return _sort_and_dedup(offsets, elements)


@numba.njit(parallel=True, cache=True)
def _merge_weighted(offsets, elements, weights, min_count):
    n = len(offsets) - 1
    sizes = np.zeros(n, dtype=np.int64)
    for g in numba.prange(n):
        a, b = offsets[g], offsets[g + 1]
        if b == a:
            continue
        # stable sort of the codes as order-preserving unsigned words (sign bit flipped):
        # the same compiled sort as the band stage's, one compile less in a process
        order = np.argsort(elements[a:b].astype(np.uint64) ^ SIGN_BIT, kind="mergesort")
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
    return sizes


@numba.njit(parallel=True, cache=True)
def _sort_and_dedup(offsets, elements):
    n = len(offsets) - 1
    sizes = np.zeros(n, dtype=np.int64)
    for g in numba.prange(n):
        a, b = offsets[g], offsets[g + 1]
        if b == a:
            continue
        sort_range(elements, a, b)
        out = a + 1
        for j in range(a + 1, b):
            if elements[j] != elements[out - 1]:
                elements[out] = elements[j]
                out += 1
        sizes[g] = out - a
    return sizes


SMALL = 24  # ranges this short are insertion-sorted


@numba.njit(cache=True)
def sort_range(values, lo, hi):
    """Sort ``values[lo:hi]`` in place: quicksort (median of three, Hoare partition, the
    smaller side first), insertion sort below :data:`SMALL`, a heapsort past a depth of
    2 log2(n) (so no input is quadratic). About 20% faster than numpy's sort on slices of
    a few dozen (measured on the branch network's sets), where a call's own cost counts."""
    depth = 0
    n = hi - lo
    while n > 1:
        depth += 2
        n >>= 1
    _quicksort(values, lo, hi, depth)


@numba.njit(cache=True)
def _quicksort(values, lo, hi, depth):
    while hi - lo > SMALL:
        if depth == 0:
            _heapsort(values, lo, hi)
            return
        depth -= 1
        mid = (lo + hi) >> 1
        a, b, c = values[lo], values[mid], values[hi - 1]
        if a > b:
            a, b = b, a
        if b > c:
            b = c
        if a > b:
            b = a
        pivot = b  # the median of the three
        i, j = lo, hi - 1
        while i <= j:
            while values[i] < pivot:
                i += 1
            while values[j] > pivot:
                j -= 1
            if i <= j:
                values[i], values[j] = values[j], values[i]
                i += 1
                j -= 1
        if j + 1 - lo < hi - i:  # recurse into the smaller side, loop on the larger
            _quicksort(values, lo, j + 1, depth)
            lo = i
        else:
            _quicksort(values, i, hi, depth)
            hi = j + 1
    for i in range(lo + 1, hi):
        x = values[i]
        j = i - 1
        while j >= lo and values[j] > x:
            values[j + 1] = values[j]
            j -= 1
        values[j + 1] = x


@numba.njit(cache=True)
def _heapsort(values, lo, hi):
    """Sort ``values[lo:hi]`` in place, O(n log n) whatever the input (the quicksort's
    fallback; numba's own sort costs over a second to compile). One loop: first building
    the max-heap, then moving its top behind it."""
    n = hi - lo
    start, end = n // 2, n
    while end > 1:
        if start > 0:
            start -= 1
        else:
            end -= 1
            values[lo], values[lo + end] = values[lo + end], values[lo]
        root = start
        while 2 * root + 1 < end:  # sift down
            child = 2 * root + 1
            if child + 1 < end and values[lo + child + 1] > values[lo + child]:
                child += 1
            if values[lo + root] >= values[lo + child]:
                break
            values[lo + root], values[lo + child] = values[lo + child], values[lo + root]
            root = child


@numba.njit(cache=True)
def compact(offsets, elements, sizes):
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


# Python side of the one-pass reader's key lookup (used by lshjob.ingest.loading)

def key_positions(keys):
    """A function mapping a batch of entity keys to their positions in the sorted ``keys``:
    -1 for a value that is not a key (for keys neither integer nor text, a position out of
    range past the last key; one before it is not checked). Dense-ish integer keys use a
    direct table built once, text keys a hash table (:mod:`lshjob.ingest.text_keys`)."""
    if keys.dtype.is_integer() and len(keys):
        k = ordered_int64(keys)
        span = int(k[-1]) - int(k[0])
        if span < DIRECT_TABLE_FACTOR * len(k):
            table = np.full(span + 1, -1, dtype=np.int64)
            table[k - k[0]] = np.arange(len(k))
            return lambda values: lookup(table, k[0], ordered_int64(values))
        if span < 2**62:  # buckets of about one key each (composite keys of lshjob.ingest.keyed, sparse numbers)
            shift = max(0, (span // len(k)).bit_length() - 1)
            starts = bucket_starts(k, shift)
            return lambda values: lookup_bucketed(k, starts, shift, ordered_int64(values))
        return lambda values: search_sorted_parallel(k, ordered_int64(values))
    text = text_positions(keys)
    if text is not None:
        return text
    return lambda values: keys.search_sorted(values).to_numpy()


def ordered_int64(values) -> np.ndarray:
    """Integer keys as int64 in the same order: unsigned 64-bit keys with the top bit
    flipped (2**63 and above would wrap to negative numbers and lose their order)."""
    v = values.to_numpy()
    if v.dtype == np.uint64:
        return (v ^ np.uint64(1 << 63)).view(np.int64)
    return v.astype(np.int64, copy=False)


DIRECT_TABLE_FACTOR = 4
