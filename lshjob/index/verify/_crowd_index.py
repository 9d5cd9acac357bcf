"""A crowd's index for :mod:`lshjob.index.verify._crowds`: its members' sets less the elements
every member holds, as ranks rarest first, each member's prefix, and the members posted
under each rank; and which of the two ways of finding the crowd's pairs it takes."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.hashing import FIBONACCI

# How a crowd's pairs are found (the kernels' ``how``): chosen per crowd by cost, or forced.
AUTO, PREFIX, COUNTED = 0, 1, 2
HOW = {"auto": AUTO, "prefix": PREFIX, "counted": COUNTED}


@numba.njit(inline="always")
def need_for(la, lb, threshold):
    """The intersection J(A, B) >= t needs: ceil(t / (1 + t) (|A| + |B|)) (as in
    :func:`lshjob.index.verify._jaccard.jaccard_between`)."""
    return int(np.ceil(threshold / (1.0 + threshold) * (la + lb) - 1e-9))




@numba.njit(cache=True)
def _rarity(offsets, elements, first, mem):
    """A crowd's distinct elements (in the order first met), how many members hold each, the
    rank of each, rarest first (ties in the order first met: members in order, each set in
    order), the members' set sizes, and the distinct element of each of the members' elements.

    The distinct elements are found with an open-addressing table (linear probing, at most
    half full) over the crowd's elements, one pass; the ranks by a counting sort of how many
    members hold an element, stable. Sorting every element of the crowd instead was 90% of
    building its index (1M long-tailed run: 1.1-1.4 s against 0.6-0.7 s for all crowds), and
    sorting each run of equal counts by key another 0.25 s: prefix filtering is exact under
    any one order of the crowd's elements (its members' prefixes all taken in it), so ties
    are left as met, which a crowd's member order fixes."""
    m = len(mem)
    size = np.empty(m, dtype=np.int64)
    total = 0
    for x in range(m):
        size[x] = offsets[mem[x] - first + 1] - offsets[mem[x] - first]
        total += size[x]
    bits = 4
    while (1 << bits) < 2 * total:
        bits += 1
    mask = np.int64((1 << bits) - 1)
    shift = np.uint64(64 - bits)
    slot = np.full(1 << bits, -1, dtype=np.int64)  # distinct element held there, -1: none
    values = np.empty(total, dtype=np.int64)
    freq = np.zeros(total, dtype=np.int64)
    which = np.empty(total, dtype=np.int64)
    nu = 0
    p = 0
    for x in range(m):
        for j in range(offsets[mem[x] - first], offsets[mem[x] - first + 1]):
            v = elements[j]
            s = np.int64((np.uint64(v) * FIBONACCI) >> shift)
            while True:
                u = slot[s]
                if u < 0:
                    slot[s] = nu
                    values[nu] = v
                    u = nu
                    nu += 1
                    break
                if values[u] == v:
                    break
                s = np.int64((s + 1) & mask)
            freq[u] += 1
            which[p] = u
            p += 1
    values, freq = values[:nu], freq[:nu]
    # ranks: a counting sort by frequency (at most m), stable
    start = np.zeros(m + 2, dtype=np.int64)
    for u in range(nu):
        start[freq[u] + 1] += 1
    for f in range(m + 1):
        start[f + 1] += start[f]
    fill = start[:m + 1].copy()
    by_freq = np.empty(nu, dtype=np.int64)
    for u in range(nu):
        by_freq[fill[freq[u]]] = u
        fill[freq[u]] += 1
    rank = np.empty(nu, dtype=np.int64)
    for t in range(nu):
        rank[by_freq[t]] = t
    return values, freq, rank, size, which


@numba.njit(cache=True)
def crowd_index(offsets, elements, first, mem, threshold, how):
    """A crowd's index: (sizes, |C| (the elements every member holds), each member's A' = A
    minus C as ranks ascending (rarest first) in CSR, its prefix length at ``threshold``,
    whether the pairs are counted (:func:`counting_pays`, or ``how``), and the members posted
    under each rank, ascending: each member's prefix, or all of A' when counted)."""
    m = len(mem)
    values, freq, rank, size, which = _rarity(offsets, elements, first, mem)
    nu = len(values)
    common = 0
    for u in range(nu):
        if freq[u] == m:
            common += 1
    local_off = np.zeros(m + 1, dtype=np.int64)
    for x in range(m):
        local_off[x + 1] = local_off[x] + size[x] - common
    # every member posted under each rank of its A', ascending (members in order); read in
    # rank order, they give each member's A' ascending with no sort
    every_off = np.zeros(nu + 1, dtype=np.int64)
    for p in range(len(which)):
        if freq[which[p]] < m:
            every_off[rank[which[p]] + 1] += 1
    for r in range(nu):
        every_off[r + 1] += every_off[r]
    fill = every_off[:nu].copy()
    every = np.empty(every_off[nu], dtype=np.int64)
    p = 0
    for x in range(m):
        for _ in range(size[x]):
            u = which[p]
            p += 1
            if freq[u] < m:
                every[fill[rank[u]]] = x
                fill[rank[u]] += 1
    local = np.empty(local_off[m], dtype=np.int64)
    at = local_off[:m].copy()
    for r in range(nu):
        for t in range(every_off[r], every_off[r + 1]):
            local[at[every[t]]] = r
            at[every[t]] += 1
    prefix = np.empty(m, dtype=np.int64)
    for x in range(m):
        smallest = int(np.ceil(threshold * size[x] - 1e-9))  # the smallest partner the size filter allows
        o = need_for(size[x], smallest, threshold) - common
        prefix[x] = min(size[x] - common, size[x] - common - max(o, 1) + 1)
    counted = how == COUNTED or (how == AUTO and counting_pays(local_off, local, prefix, nu))
    if counted:
        return size, common, local_off, local, prefix, counted, every_off, every
    post_off = np.zeros(nu + 1, dtype=np.int64)
    for x in range(m):
        for q in range(local_off[x], local_off[x] + prefix[x]):
            post_off[local[q] + 1] += 1
    for r in range(nu):
        post_off[r + 1] += post_off[r]
    fill = post_off[:nu].copy()
    posted = np.empty(post_off[nu], dtype=np.int64)
    for x in range(m):
        for q in range(local_off[x], local_off[x] + prefix[x]):
            posted[fill[local[q]]] = x
            fill[local[q]] += 1
    return size, common, local_off, local, prefix, counted, post_off, posted


@numba.njit(cache=True)
def counting_pays(local_off, local, prefix, ranks):
    """Whether counting every shared element of A' (an increment a shared element and pair)
    costs less than intersecting the pairs the prefixes propose (a proposal, with repeats, a
    rank two prefixes share, and a merge of the pair's A' at each, which stops early). A
    proposal is costed at (mean |A'| / 2 + 4) increments, fitted on this machine (2 cores,
    each way timed alone on every crowd of a run, index included): long-tailed data of Zipf
    exponent 1.6 at 300k (mean |A'| 5: about 6.6 increments a proposal) and of exponent 1.2 at
    1M (mean |A'| 9.3: about 8.3), and synthetic crowds of 600 sets of 100-200 elements at
    thresholds 0.5 and 0.8 (mean |A'| 103: about 60)."""
    m = len(prefix)
    held = np.zeros(ranks, dtype=np.int64)
    in_prefix = np.zeros(ranks, dtype=np.int64)
    for x in range(m):
        for q in range(local_off[x], local_off[x + 1]):
            held[local[q]] += 1
        for q in range(local_off[x], local_off[x] + prefix[x]):
            in_prefix[local[q]] += 1
    increments = proposals = 0
    for r in range(ranks):
        increments += held[r] * (held[r] - 1) // 2
        proposals += in_prefix[r] * (in_prefix[r] - 1) // 2
    return increments <= proposals * (local_off[m] / max(m, 1) / 2.0 + 4.0)
