"""Verification of crowds: every pair of a large bucket's members, made and verified a bucket's
sets at a time (:mod:`lshjob.index.join.base`, CROWDS). The join writes no row for these pairs;
on long-tailed data they are most candidates (buckets of hundreds of small sets of popular
elements), and a bucket's sets stay in cache while its pairs are verified."""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.search import first_at_least
from lshjob.index.verify._crowd_index import HOW, crowd_index, need_for
from lshjob.index.verify._crowd_members import (
    by_size,
    crowds_by_band,
    floor_within,
    list_tallies,
    may_reach,
    member_floors,
    read_only,
    rise,
    weight_within,
)
from lshjob.index.verify._crowds_between import _crowd_pairs
from lshjob.index.verify._jaccard import _intersection, element_masks

MAX_PAIRS = 1 << 22  # pairs made at a time (three 8-byte values each)
# Pairs one crowd may write (within one range): 470 MB of buffers. A crowd finding more (tens of
# thousands of sets, every pair similar) keeps those and is counted (``tally["crowds_cut"]``).
CROWD_ROOM = 1 << 24


@numba.njit(inline="always")
def _crowds_shared(crowd_at, x, y, lo, hi):
    """The bands lo..hi-1 where rows x and y of ``crowd_at`` are in one crowd (no branch: the
    compiler makes it a few vector compares)."""
    n = 0
    for b in range(lo, hi):
        n += (crowd_at[x, b] == crowd_at[y, b]) & (crowd_at[x, b] != 0)
    return n


@numba.njit(inline="always")
def _keep(local, local_off, common, mem, x, y, la, lb, need, threshold, inter, crowd_at, bits, band, out,
          out_left, out_right, out_jac, out_bands):
    """Members x and y (sizes la >= lb): their intersection ``inter`` when counted, or (-1) |C|
    plus the intersection of what they do not all share (``local``, the crowd's ranks: small,
    in cache); write the pair at ``out`` when it reaches the threshold (the filters of
    :func:`_crowd_pairs`); the next free slot. With the crowds' bands (``crowd_at``: each
    member's crowd a band, 0 for none, a row a member of this crowd; ``bits``: the bands (mod
    64) member x has a crowd in; ``band``: this crowd's), a pair
    sharing a crowd of an earlier band is left to it, and a pair written gets the number of
    crowds it shares as its ``out_bands``."""
    if inter >= 0 and (inter < need or inter / (lb + la - inter) < threshold):
        return out  # counted: below, before its bands are looked up
    both = np.uint64(0)
    if band >= 0:
        both = bits[x] & bits[y]
        if both & ((np.uint64(1) << np.uint64(band)) - np.uint64(1) if band < 64 else ~np.uint64(0)) \
                and _crowds_shared(crowd_at, x, y, 0, band):
            return out
    if inter < 0:
        inter = common + _intersection(local, local_off[y], local_off[y + 1], local, local_off[x], local_off[x + 1],
                                       need - common)
    value = inter / (lb + la - inter)
    if inter >= need and value >= threshold:
        out_left[out] = min(mem[x], mem[y])
        out_right[out] = max(mem[x], mem[y])
        out_jac[out] = value
        shared = 1
        if band >= 0:
            if crowd_at.shape[1] > 64 or band >= 63 or both >> np.uint64(band + 1):  # (bits are bands mod 64)
                shared += _crowds_shared(crowd_at, x, y, band + 1, crowd_at.shape[1])
        out_bands[out] = shared
        return out + 1
    return out


@numba.njit(inline="always")
def _try(x, y, inter, size, at, distinct, common, local, local_off, mem, crowd_at, bits, band, out, end,
         rising, threshold, first, weight, tally, top, above, wanted, out_left, out_right, out_jac, out_bands):
    """Pair (x, y) of a crowd, y before x (:func:`_keep`), sought at the lower of its sides'
    floors; (the next free slot, whether the crowd's room is full)."""
    la, lb = size[x], size[y]
    sought = min(at[x], at[y])
    if lb < sought * la - 1e-9 or not may_reach(la, lb, sought, distinct):
        return out, False
    if out >= end:
        return out, True
    kept = _keep(local, local_off, common, mem, x, y, la, lb, need_for(la, lb, sought), sought, inter, crowd_at,
                 bits, band, out, out_left, out_right, out_jac, out_bands)
    if rising and kept > out:
        rise(x, y, out_jac[out], threshold, mem, first, weight, tally, top, above, wanted, at)
    return kept, False


@numba.njit(inline="always")
def _count_shared(local, local_off, post_off, posted, x, low, shared, touched):
    """Member x counts, through the postings of each element of its A', the elements each
    earlier member from ``low`` shares with it (``shared``, zero before), and lists the
    members met in ``touched``; their number. (The plan's sample counts overlaps the same way,
    over the members a sample set may meet: :mod:`lshjob.plan.similarity`.)"""
    met = 0
    for q in range(local_off[x], local_off[x + 1]):
        r = local[q]
        for t in range(first_at_least(posted, post_off[r], post_off[r + 1], low), post_off[r + 1]):
            y = posted[t]
            if y >= x:
                break
            if shared[y] == 0:
                touched[met] = y
                met += 1
            shared[y] += 1
    return met


@numba.njit(parallel=True, cache=True)
def _crowd_pairs_within(offsets, elements, first, members, start, count, base, room, threshold, floor, weight, cap,
                        distinct, how, crowd_at, in_bands, row_of, bands, out_left, out_right, out_jac, out_bands,
                        found, full):
    """The pairs of each crowd (members ``members[start[c]:start[c] + count[c]]``, one range,
    by set size ascending) whose Jaccard reaches ``threshold``: the same pairs, with the same
    values, as :func:`_crowd_pairs`, without intersecting every pair. Written from slot
    ``base[c]`` on, their number in ``found[c]``; at most ``room[c]`` of them: a crowd that
    finds more stops there, with ``full[c]`` set.

    A crowd's members share the elements every one of them holds (C; on long-tailed data the
    popular element that made the bucket), so |A n B| = |C| + |A' n B'| with A' = A minus C. A
    pair whose needed intersection (:func:`need_for`) is at most |C| may reach the threshold
    with no other shared element. Any other pair that reaches it shares an element of A', and
    a crowd finds those one of two ways (:mod:`lshjob.index.verify._crowd_index`, by cost, or
    ``how``):

    - by prefixes: with the crowd's elements ordered rarest first, a pair that needs
      o = need - |C| >= 1 elements of A' shares one among the first |A'| - o + 1 of each side
      (prefix filtering: Chaudhuri, Ganti, Kaushik, ICDE 2006; Xiao, Wang, Lin, Yu, WWW 2008);
      each member's prefix is cut for the smallest o of any partner its size allows, and the
      members sharing a prefix element are intersected, each pair once;
    - counted: every member posted under each element of its A', a member counts, through the
      postings of its own elements, the elements each earlier member shares with it (|A' n B'|
      exactly, an increment each; the ScanCount of Li, Lu, Lu, ICDE 2008), so no pair is
      merged. Tiny sets of popular elements (long-tailed data) leave prefixes nearly their
      whole sets, where this is several times faster.

    ``bands[c]``: crowd c's band, or -1 when the bands are not known. Known, a pair of members
    of crowds of several bands is written by the crowd of its first band only, with the
    number of crowds it shares (:func:`_keep`): one row where a crowd each would give one.

    ``floor`` (by entity id from ``first``; empty for none): each set's top-k floor
    (:func:`lshjob.index._ranking.list_cuts`). A pair below both its sides' floors enters
    neither list, so pair (x, y) is sought at max(threshold, min(floor x, floor y)) only: its
    size filter, needed intersection and early exit grow with it, and the prefixes serve the
    crowd's lowest, the least any of its pairs is sought at. With ``weight`` (by entity id
    from ``first``: the rows a set's group brings a list, min(top_k + 1, group size)) and
    ``cap`` (top_k + 1), the floors also rise with the pairs the crowd finds
    (:func:`lshjob.index.verify._crowd_members.rise`).

    ``distinct``: the members are distinct sets (representatives, :mod:`lshjob.index.collapse`),
    so two of one size share at most all but one element, J <= (|A| - 1) / (|A| + 1), and a
    pair of equal sizes that bound puts below what it is sought at is not intersected."""
    for c in numba.prange(start.shape[0]):
        mem = members[start[c]:start[c] + count[c]]
        m = len(mem)
        at, lowest = member_floors(mem, first, floor, threshold)
        size, common, local_off, local, prefix, counted, post_off, posted = crowd_index(offsets, elements, first, mem,
                                                                                        lowest, how)
        rising = len(weight) > 0 and len(floor) > 0
        tally, top, above, wanted = list_tallies(mem, first, weight, cap, rising)
        seen = np.full(m if not counted else 0, -1, dtype=np.int64)
        shared = np.zeros(m if counted else 0, dtype=np.int64)  # |A' n B'| of each earlier member, counted
        touched = np.empty(m if counted else 0, dtype=np.int64)
        # each member's row of crowd_at and bands, gathered once (a pair reads them in cache)
        mine = np.zeros((m if bands[c] >= 0 else 0, crowd_at.shape[1]), dtype=np.int32)
        bits = np.zeros(m, dtype=np.uint64)
        for x in range(m if bands[c] >= 0 else 0):
            mine[x] = crowd_at[row_of[mem[x] - first]]
            bits[x] = in_bands[row_of[mem[x] - first]]
        out, end, stop = base[c], base[c] + room[c], False
        # each member's partners, gathered in the order of the three ways below, then tried
        # by one call site (each inlined copy of _try costs the compile about 15 s)
        cand_y = np.empty(m, dtype=np.int64)
        cand_inter = np.empty(m, dtype=np.int64)
        for x in range(m):
            la = size[x]
            low = first_at_least(size, 0, x, lowest * la - 1e-9)  # the size filter, sizes ascending
            met = _count_shared(local, local_off, post_off, posted, x, low, shared, touched) if counted else 0
            n = 0
            for y in range(x):  # partners whose needed intersection C alone may give
                if need_for(la, size[y], threshold) > common:
                    break  # later partners are at least as large
                cand_y[n], cand_inter[n] = y, common + shared[y] if counted else -1
                n += 1
            for i in range(met):
                y = touched[i]
                inter, shared[y] = common + shared[y], 0
                need = need_for(la, size[y], threshold)
                # (those C alone may take there were gathered above; one sharing fewer than the
                # threshold needs is below every value it is sought at: not tried)
                if need > common and inter >= need:
                    cand_y[n], cand_inter[n] = y, inter
                    n += 1
            for q in range(local_off[x], local_off[x] + (0 if counted else prefix[x])):
                r = local[q]
                for t in range(first_at_least(posted, post_off[r], post_off[r + 1], low), post_off[r + 1]):
                    y = posted[t]
                    if y >= x:
                        break
                    if seen[y] == x:
                        continue
                    seen[y] = x
                    if need_for(la, size[y], threshold) > common:  # (the others were gathered above)
                        cand_y[n], cand_inter[n] = y, -1
                        n += 1
            for i in range(n):
                out, stop = _try(x, cand_y[i], cand_inter[i], size, at, distinct, common, local, local_off, mem,
                                 mine, bits, bands[c], out, end, rising, threshold, first, weight, tally, top,
                                 above, wanted, out_left, out_right, out_jac, out_bands)
                if stop:
                    break
            if stop:
                break
        found[c] = out - base[c]
        full[c] = stop


def _by_crowd(crowds: np.ndarray, reps: np.ndarray, bands: np.ndarray | None, first: int, last: int):
    """The members of each crowd within entity ids first..last: (crowd ids, start, count, reps,
    each member's crowd, each member's band or None)."""
    inside = (reps >= first) & (reps <= last)
    crowd, members = crowds[inside], reps[inside]
    ids, start, count = np.unique(crowd, return_index=True, return_counts=True)
    return (ids, start.astype(np.int64), count.astype(np.int64), np.ascontiguousarray(members, dtype=np.int64), crowd,
            None if bands is None else bands[inside])


def crowd_pairs_between(crowds: pl.DataFrame | None, left_range: tuple[int, int], right_range: tuple[int, int]):
    """What :func:`verify_crowds` needs for the block of ranges (i, j), or None when no crowd
    has a pair there. ``crowds``: CROWDS (sorted by crowd then rep; with ``band`` when the
    join gave it)."""
    if crowds is None or crowds.height == 0:
        return None
    crowd, reps = crowds["crowd"].to_numpy(), crowds["rep"].to_numpy()
    bands = crowds["band"].to_numpy().astype(np.int64) if "band" in crowds.columns else None
    a_ids, a_start, a_count, a_members, a_crowd, a_band = _by_crowd(crowd, reps, bands, *left_range)
    if left_range == right_range:
        keep = a_count >= 2
        block = (a_members, a_crowd, a_start[keep], a_count[keep], a_members, a_crowd, a_start[keep], a_count[keep],
                 True, a_band)
        pairs = a_count[keep] * (a_count[keep] - 1) // 2
    else:
        b_ids, b_start, b_count, b_members, b_crowd, _ = _by_crowd(crowd, reps, None, *right_range)
        both, ia, ib = np.intersect1d(a_ids, b_ids, assume_unique=True, return_indices=True)
        block = (a_members, a_crowd, a_start[ia], a_count[ia], b_members, b_crowd, b_start[ib], b_count[ib], False,
                 None)
        pairs = a_count[ia] * b_count[ib]
    return (block, pairs) if pairs.sum() > 0 else None


def verify_crowds(block, left_sets, left_first: int, right_sets, right_first: int, threshold: float,
                  max_pairs: int = MAX_PAIRS, how: str = "auto") -> pl.DataFrame:
    """The crowds' pairs whose Jaccard reaches ``threshold``, as :func:`lshjob.index.verify.local.verify_between`
    gives them: a row a crowd, ``bands_shared`` 1 (summed with the pair's other rows later);
    within one range and given the crowds' bands, a row a pair, ``bands_shared`` the crowds it
    lies in. ``block``: from :func:`crowd_pairs_between`; at most ``max_pairs`` pairs (or one
    crowd's) made at a time; ``how``: as :func:`crowd_pieces`."""
    return pl.concat(list(crowd_pieces(block, left_sets, left_first, right_sets, right_first, threshold, max_pairs,
                                       how=how)))


def crowd_pieces(block, left_sets, left_first: int, right_sets, right_first: int, threshold: float,
                 max_pairs: int = MAX_PAIRS, floors=None, tally: dict | None = None, room: int = CROWD_ROOM,
                 group_sizes=None, top_k: int | None = None, distinct: bool = False, how: str = "auto",
                 masks: tuple[np.ndarray, np.ndarray] | None = None):
    """:func:`verify_crowds`'s rows, a chunk of at most ``max_pairs`` pairs made at a time, so
    the caller can deduplicate as they come. ``floors()``, when given, returns each entity id's
    top-k floor now (:func:`lshjob.index._ranking.list_cuts`), read before each chunk: the
    pairs below both sides' floors are not sought, nor returned. Within one
    range a crowd writes at most ``room`` pairs; ``tally["crowds_cut"]`` counts those cut there.
    With the floors, ``group_sizes`` (by entity id) and ``top_k``, a crowd raises its members'
    floors with the pairs it finds. ``distinct``: no two members of a range hold the same set
    (representatives), which spares pairs of one size (:func:`_crowd_pairs_within`). ``how``:
    "auto" (each crowd by cost), "prefix" or "counted" (every crowd that way; for tests).
    ``masks``: both sides' :func:`lshjob.index.verify._jaccard.element_masks`, when the caller
    has them (made here otherwise; read between two ranges only)."""
    (a_members, a_crowd, a_start, a_count, b_members, b_crowd, b_start, b_count, same, a_band), pairs = block
    # read-only views: one compiled kernel whether a run loaded the sets or read a saved part
    same_sets, left_sets = right_sets is left_sets, read_only(left_sets)
    right_sets = left_sets if same_sets else read_only(right_sets)
    crowd_at, in_bands, row_of, crowd_band = crowds_by_band(a_members, a_crowd, a_band, a_start, left_first,
                                                   len(left_sets.offsets) - 1)
    a_members = by_size(a_members, a_crowd, left_sets, left_first)  # each crowd's members by set size
    b_members = a_members if same else by_size(b_members, b_crowd, right_sets, right_first)
    slots = np.minimum(pairs, room) if same else pairs  # found pairs only, within one range
    weight = weight_within(group_sizes if floors is not None else None, top_k, left_first, len(left_sets.offsets) - 1)
    large = 0
    if same:  # crowds that would fill a chunk alone go first, as many a chunk as there are threads
        big = slots > max_pairs // numba.get_num_threads()
        order = np.concatenate([np.flatnonzero(big)[np.argsort(-a_count[big], kind="stable")], np.flatnonzero(~big)])
        a_start, a_count, crowd_band, slots = a_start[order], a_count[order], crowd_band[order], slots[order]
        large = int(big.sum())
    cum = np.cumsum(slots)
    bounds = [(lo, min(lo + numba.get_num_threads(), large)) for lo in range(0, large, numba.get_num_threads())]
    lo = large
    while lo < len(slots):
        done = cum[lo - 1] if lo else 0
        hi = max(lo + 1, int(np.searchsorted(cum, done + max_pairs, side="right")))
        bounds.append((lo, hi))
        lo = hi
    bounds = [(lo, hi, int(cum[lo - 1]) if lo else 0) for lo, hi in bounds]
    # one set of buffers for every chunk (slots are written only by the pairs found; fresh
    # buffers cost a page fault each 4 KiB)
    size = max(int(cum[hi - 1] - done) for lo, hi, done in bounds)
    out_left = np.empty(size, dtype=np.int64)
    out_right = np.empty(size, dtype=np.int64)
    out_jac = np.empty(size)
    out_bands = np.empty(size, dtype=np.int32) if same else np.ones(size, dtype=np.int32)
    if masks is None and not same:
        masks = (element_masks(left_sets.offsets, left_sets.elements),
                 element_masks(right_sets.offsets, right_sets.elements))
    for lo, hi, done in bounds:
        base = np.concatenate([[0], cum[lo:hi - 1] - done]).astype(np.int64)
        if same:  # either way, the pairs found are written first in each crowd's slots
            found, full = np.zeros(hi - lo, dtype=np.int64), np.zeros(hi - lo, dtype=np.bool_)
            floor = floor_within(floors, left_first, len(left_sets.offsets) - 1)
            _crowd_pairs_within(left_sets.offsets, left_sets.elements, left_first, a_members, a_start[lo:hi],
                                a_count[lo:hi], base, np.ascontiguousarray(slots[lo:hi], dtype=np.int64), threshold,
                                floor, weight, (top_k or 0) + 1, distinct, HOW[how], crowd_at, in_bands, row_of,
                                crowd_band[lo:hi], out_left, out_right, out_jac, out_bands, found, full)
            if tally is not None and full.any():
                tally["crowds_cut"] = tally.get("crowds_cut", 0) + int(full.sum())
            keep = np.arange(int(found.sum())) + np.repeat(base - (np.cumsum(found) - found), found)
        else:
            found = np.zeros(hi - lo, dtype=np.int64)
            _crowd_pairs(left_sets.offsets, left_sets.elements, masks[0], left_first, right_sets.offsets,
                         right_sets.elements, masks[1], right_first, a_members, a_start[lo:hi], a_count[lo:hi],
                         b_members, b_start[lo:hi], b_count[lo:hi], same, base, threshold,
                         floor_within(floors, left_first, len(left_sets.offsets) - 1),
                         floor_within(floors, right_first, len(right_sets.offsets) - 1), out_left, out_right,
                         out_jac, found)
            keep = np.arange(int(found.sum())) + np.repeat(base - (np.cumsum(found) - found), found)
        yield pl.DataFrame({"left_rep": out_left[keep], "right_rep": out_right[keep], "jaccard": out_jac[keep],
                            "bands_shared": out_bands[keep] if same else np.ones(len(keep), dtype=np.int32)})
