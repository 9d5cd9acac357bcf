"""Publishing's compiled helpers: each representative's list ranked and cut, made straight
from the verified pairs and the groups of identical sets (:func:`ranked_lists`), a member's
rows made from its representative's list in one pass (:func:`member_rows`), and the pairs
that can enter a list at all (:func:`pairs_in_lists`, used by verification)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.search import kth_smallest


@numba.njit(inline="always")
def _append(out, held, limit, count, firsts, given, side, j, bands, head_id, estimates, side_bands, neighbour, jaccard,
            estimate, bands_shared, own):
    """Append rows to a list (``held`` of ``limit`` rows so far): ``count`` neighbours, from
    ``head_id[firsts:]`` (or ``given``, when ``firsts`` < 0), at Jaccard ``j`` with the
    values of the side's pair at ``side`` (or, when ``side`` < 0, the list's own group:
    estimate 1 and every band, its members marked ``own``). Returns the rows held."""
    for t in range(count):
        if held == limit:
            break
        n = head_id[firsts + t] if firsts >= 0 else given[t]
        neighbour[out + held] = n
        jaccard[out + held] = j
        if side < 0:
            estimate[out + held], bands_shared[out + held] = 1.0, bands
            own[n] = True
        else:
            estimate[out + held], bands_shared[out + held] = estimates[side], side_bands[side]
        held += 1
    return held


@numba.njit(inline="always")
def _side_starts(left, right, groups, starts):
    """A counting sort's first pass over pairs under both their sides: side g's slots begin at
    ``starts[g]`` (filled in; zeros given, ``groups + 1`` of them); returns a copy of the
    starts, the next free slot of each side."""
    for p in range(len(left)):
        starts[left[p] + 1] += 1
        starts[right[p] + 1] += 1
    for g in range(groups):
        starts[g + 1] += starts[g]
    return starts[:-1].copy()


@numba.njit(cache=True)
def _sides(left, right, jaccard, estimate, bands_shared, groups, starts, other, value, estimates, side_bands):
    """Each pair under both its sides, laid out by side (a counting sort): side g's pairs at
    ``starts[g]:starts[g + 1]`` of ``other`` (its other side), ``value`` (its Jaccard),
    ``estimates`` and ``side_bands``, so a list reads its pairs in one run."""
    fill = _side_starts(left, right, groups, starts)
    for p in range(len(left)):
        a, b = left[p], right[p]
        j, e, s = jaccard[p], estimate[p], bands_shared[p]
        at = fill[a]
        other[at], value[at], estimates[at], side_bands[at] = b, j, e, s
        fill[a] += 1
        at = fill[b]
        other[at], value[at], estimates[at], side_bands[at] = a, j, e, s
        fill[b] += 1


@numba.njit(inline="always")
def _sort_down(lo, hi, value, other, estimates, side_bands):
    """Sort a side's pairs ``lo:hi`` by Jaccard descending, in place (an insertion sort for
    the few pairs most sides have)."""
    if hi - lo > 32:
        order = np.argsort(-value[lo:hi]) + lo
        v, o, e, b = value[order], other[order], estimates[order], side_bands[order]
        value[lo:hi], other[lo:hi], estimates[lo:hi], side_bands[lo:hi] = v, o, e, b
        return
    for i in range(lo + 1, hi):
        v, o, e, b = value[i], other[i], estimates[i], side_bands[i]
        at = i
        while at > lo and value[at - 1] < v:
            value[at], other[at], estimates[at], side_bands[at] = (value[at - 1], other[at - 1], estimates[at - 1],
                                                                  side_bands[at - 1])
            at -= 1
        value[at], other[at], estimates[at], side_bands[at] = v, o, e, b


@numba.njit(parallel=True, cache=True)
def _lists(starts, other, value, estimates, side_bands, capped, head_first, head_id, bands, list_starts, neighbour,
           jaccard, estimate, bands_shared, own):
    """Each representative g's list, ranked, at ``list_starts[g]``: the first ``capped[g]``
    members of its own group (when it has more than one) at Jaccard 1, and for each of its
    pairs the first ``capped`` members of the partner's group at the pair's values; cut at
    the list's length. The pairs of g are sorted by Jaccard descending; the rows of a pair
    come in neighbour order at one Jaccard, so they are appended as they are, and only the
    rows of pairs of equal Jaccard (its own group's at 1 among them) are merged by a sort on
    the neighbour. Marks ``own`` the members a representative's list holds of its own group."""
    for g in numba.prange(len(list_starts) - 1):
        out = list_starts[g]
        limit = list_starts[g + 1] - out
        if limit == 0:
            continue
        lo, hi = starts[g], starts[g + 1]
        _sort_down(lo, hi, value, other, estimates, side_bands)
        mine = capped[g] > 1  # its own group comes at Jaccard 1, before or among the pairs at 1
        held, x = 0, lo
        while held < limit and (mine or x < hi):
            j = 1.0 if mine else value[x]
            y = x
            while y < hi and value[y] == j:
                y += 1
            if y - x + mine == 1:  # one pair, or its own group, at this Jaccard: its rows in order
                if mine:
                    held = _append(out, held, limit, capped[g], head_first[g], head_id, -1, j, bands, head_id,
                                   estimates, side_bands, neighbour, jaccard, estimate, bands_shared, own)
                else:
                    q = other[x]
                    held = _append(out, held, limit, capped[q], head_first[q], head_id, x, j, bands, head_id,
                                   estimates, side_bands, neighbour, jaccard, estimate, bands_shared, own)
            else:  # the rows of pairs at one Jaccard: merged by neighbour
                total = capped[g] if mine else 0
                for z in range(x, y):
                    total += capped[other[z]]
                tied = np.empty(total, dtype=np.int64)
                from_pair = np.empty(total, dtype=np.int64)
                at = 0
                if mine:
                    for t in range(head_first[g], head_first[g] + capped[g]):
                        tied[at], from_pair[at] = head_id[t], -1
                        at += 1
                for z in range(x, y):
                    for t in range(head_first[other[z]], head_first[other[z]] + capped[other[z]]):
                        tied[at], from_pair[at] = head_id[t], z
                        at += 1
                for t in np.argsort(tied):
                    held = _append(out, held, limit, 1, -1, tied[t:t + 1], from_pair[t], j, bands, head_id,
                                   estimates, side_bands, neighbour, jaccard, estimate, bands_shared, own)
            mine = False
            x = y


def ranked_lists(left: np.ndarray, right: np.ndarray, pair_jaccard: np.ndarray, pair_estimate: np.ndarray,
                 pair_bands: np.ndarray, sizes: np.ndarray, head_first: np.ndarray, head_id: np.ndarray,
                 cap: int, bands: int, key: type):
    """Each representative's neighbour list (:func:`_lists`) ranked by Jaccard descending,
    ties by neighbour ascending (neighbours distinct within a list), cut at ``cap``; the
    rows each pair brings are never made beside the lists. Returns ``list_starts`` (the
    list of g is rows ``list_starts[g]:list_starts[g + 1]``), the lists' columns
    (neighbour, jaccard, estimate, bands_shared) and ``own`` (the members their own
    representative's list holds). The same lists as a sort of every row by (src, -jaccard,
    neighbour) and the first ``cap`` of each src."""
    n = len(sizes)
    capped = np.minimum(cap, sizes).astype(np.int64)
    rows = np.where(capped > 1, capped, 0)  # rows before the cut: its own group's, and each pair's
    rows += np.bincount(left, weights=capped[right], minlength=n).astype(np.int64)
    rows += np.bincount(right, weights=capped[left], minlength=n).astype(np.int64)
    list_starts = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.minimum(rows, cap), out=list_starts[1:])
    del rows
    total = int(list_starts[-1])
    neighbour, jaccard = np.empty(total, dtype=key), np.empty(total, dtype=np.float64)
    estimate, bands_shared = np.empty(total, dtype=np.float64), np.empty(total, dtype=np.int32)
    own = np.zeros(n, dtype=np.bool_)
    if total:
        left64, right64 = np.ascontiguousarray(left, dtype=np.int64), np.ascontiguousarray(right, dtype=np.int64)
        sides = 2 * len(left)  # each pair under both its sides: 24 bytes each
        starts, other = np.zeros(n + 1, dtype=np.int64), np.empty(sides, dtype=key)
        value, estimates, side_bands = np.empty(sides), np.empty(sides), np.empty(sides, dtype=np.int32)
        _sides(left64, right64, np.ascontiguousarray(pair_jaccard, dtype=np.float64),
               np.ascontiguousarray(pair_estimate, dtype=np.float64), np.ascontiguousarray(pair_bands, dtype=np.int32),
               n, starts, other, value, estimates, side_bands)
        del left64, right64
        _lists(starts, other, value, estimates, side_bands, capped, np.ascontiguousarray(head_first, dtype=np.int64),
               head_id, np.int32(bands), list_starts, neighbour, jaccard, estimate, bands_shared, own)
    return list_starts, neighbour, jaccard, estimate, bands_shared, own


@numba.njit(parallel=True, cache=True)
def _rows(ids, reps, offsets, list_starts, listed, jaccard, estimate, bands_shared, keys,
          out_entity, out_neighbour, out_jaccard, out_estimate, out_bands, out_rank):
    """Member m's rows at ``offsets[m]``: its representative's list without itself, as many
    as ``offsets[m + 1] - offsets[m]`` (the cut at top-k), ranked 1, 2, ...; the entities'
    keys gathered from ``keys`` by id."""
    for m in numba.prange(len(ids)):
        me = ids[m]
        out, want = offsets[m], offsets[m + 1] - offsets[m]
        r = 0
        for t in range(list_starts[reps[m]], list_starts[reps[m] + 1]):
            if r == want:
                break
            if listed[t] == me:
                continue
            out_entity[out + r] = keys[me]
            out_neighbour[out + r] = keys[listed[t]]
            out_jaccard[out + r] = jaccard[t]
            out_estimate[out + r] = estimate[t]
            out_bands[out + r] = bands_shared[t]
            out_rank[out + r] = r + 1
            r += 1


def member_rows(ids: np.ndarray, reps: np.ndarray, counts: np.ndarray, list_starts: np.ndarray,
                listed: np.ndarray, jaccard: np.ndarray, estimate: np.ndarray, bands_shared: np.ndarray,
                keys: np.ndarray) -> tuple[np.ndarray, ...]:
    """The rows of the members ``ids`` (their representatives ``reps``, ``counts`` rows each):
    (entity, neighbour, jaccard, estimate, bands_shared, rank) in member order, then rank,
    in one pass (:func:`_rows`); entity and neighbour are ``keys[id]``."""
    offsets = np.zeros(len(ids) + 1, dtype=np.int64)
    np.cumsum(counts, out=offsets[1:])
    total = int(offsets[-1])
    out = (np.empty(total, dtype=keys.dtype), np.empty(total, dtype=keys.dtype), np.empty(total, dtype=np.float64),
           np.empty(total, dtype=np.float64), np.empty(total, dtype=np.int32), np.empty(total, dtype=np.uint32))
    if total:
        _rows(ids, reps, offsets, list_starts, listed, jaccard, estimate, bands_shared, keys, *out)
    return out


SIDE_TASK = 1 << 18  # pairs a task of :func:`_by_side` at least


@numba.njit(parallel=True, cache=True)
def _by_side(left, right, groups, tasks):
    """Each pair under both its sides (a counting sort): (starts, pair) with the pairs of
    side g at ``pair[starts[g]:starts[g + 1]]``, ascending. ``tasks`` of consecutive pairs
    count and then place their own; a side's slots are shared out in task order, so the pairs
    are where one pass over them in order would put them."""
    n = len(left)
    step = (n + tasks - 1) // tasks
    fill = np.zeros((tasks, groups), dtype=np.int64)
    for t in numba.prange(tasks):
        for p in range(t * step, min(n, (t + 1) * step)):
            fill[t, left[p]] += 1
            fill[t, right[p]] += 1
    starts = np.zeros(groups + 1, dtype=np.int64)
    for g in range(groups):  # each task's first slot in side g, in task order
        at = starts[g]
        for t in range(tasks):
            count = fill[t, g]
            fill[t, g] = at
            at += count
        starts[g + 1] = at
    pair = np.empty(2 * n, dtype=np.int64)
    for t in numba.prange(tasks):
        for p in range(t * step, min(n, (t + 1) * step)):
            pair[fill[t, left[p]]] = p
            fill[t, left[p]] += 1
            pair[fill[t, right[p]]] = p
            fill[t, right[p]] += 1
    return starts, pair


@numba.njit(inline="always")
def _partner(left, right, p, g):
    return right[p] if left[p] == g else left[p]


@numba.njit(inline="always")
def _side_cut(lo, hi, pair, left, right, jaccard, capped, cap, g, own):
    """The value at which side g's pairs ``pair[lo:hi]`` and its own group's ``own`` rows
    reach ``cap`` rows (:func:`_cut_both`), -1.0 when they never do. Every pair brings a row
    or more, so the value lies among the side's ``cap`` highest: they are held sorted (an
    insertion, one comparison for a pair that does not enter), not the whole side."""
    values = np.empty(cap, dtype=np.float64)  # the highest values, descending
    weights = np.empty(cap, dtype=np.int64)
    held = 0
    total = own
    for i in range(lo, hi):
        p = pair[i]
        w = capped[_partner(left, right, p, g)]
        total += w
        v = jaccard[p]
        if held == cap and v <= values[cap - 1]:
            continue
        at = held if held < cap else cap - 1
        while at > 0 and values[at - 1] < v:
            if at < cap:
                values[at] = values[at - 1]
                weights[at] = weights[at - 1]
            at -= 1
        values[at] = v
        weights[at] = w
        held = min(held + 1, cap)
    if total >= cap:
        reached = own
        for i in range(held):
            reached += weights[i]
            if reached >= cap:
                return values[i]
    return -1.0


@numba.njit(inline="always")
def _last_at_cut(lo, hi, pair, left, right, jaccard, capped, cap, g, own, cutoff):
    """The largest partner id of side g's pairs at ``cutoff`` that can bring a row into its
    list (-1: every one). The rows above the cut leave ``need`` places, taken by the smallest
    neighbour ids at it."""
    need, ties = cap - own, 0
    for i in range(lo, hi):
        p = pair[i]
        if jaccard[p] > cutoff:
            need -= capped[_partner(left, right, p, g)]
        elif jaccard[p] == cutoff:
            ties += 1
    if ties <= need:
        return -1
    tied = np.empty(ties, dtype=np.int64)
    t = 0
    for i in range(lo, hi):
        if jaccard[pair[i]] == cutoff:
            tied[t] = _partner(left, right, pair[i], g)
            t += 1
    return kth_smallest(tied, need - 1)  # the need-th smallest, in linear time


@numba.njit(parallel=True, cache=True)
def _cut_both(starts, pair, left, right, jaccard, capped, cap, keep, cutoffs):
    """For each side g, over the pairs of g (a partner's group brings ``capped`` rows, g's own
    group ``capped[g]`` rows of 1.0 when it has members): once ``cap`` rows are reached at
    value v (:func:`_side_cut`), no row below v can enter g's list, so a pair above v is
    kept, by either side: ``keep`` is only ever set.

    Of the pairs at v, g's list takes the rows of smallest neighbour id (:func:`_lists`), as
    many as the rows above v leave room for. A partner group's rows are its members from its
    representative on (the smallest id of its group), so a pair at v whose partner is not
    among that many smallest partners at v brings no row: only those are kept
    (:func:`_last_at_cut`; all of them at v = 1.0, where g's own group ties with them). More
    pairs only raise v, or add rows above it and partners at it, so a pair left out here is
    left out with them too."""
    for g in numba.prange(len(starts) - 1):
        lo, hi = starts[g], starts[g + 1]
        if lo == hi:
            continue
        own = capped[g] if capped[g] > 1 else 0
        cutoff = 1.0 if own >= cap else _side_cut(lo, hi, pair, left, right, jaccard, capped, cap, g, own)
        cutoffs[g] = cutoff
        last = -1
        if -1.0 < cutoff < 1.0:
            last = _last_at_cut(lo, hi, pair, left, right, jaccard, capped, cap, g, own, cutoff)
        for i in range(lo, hi):
            p = pair[i]
            if jaccard[p] > cutoff or (jaccard[p] == cutoff and (last < 0 or _partner(left, right, p, g) <= last)):
                keep[p] = True


def pairs_in_lists(left: np.ndarray, right: np.ndarray, jaccard: np.ndarray, group_sizes: np.ndarray,
                   top_k: int) -> np.ndarray:
    """Which pairs of representatives (``left``, ``right``, their ``jaccard``; each pair once)
    can bring a row into the list publishing makes for either side (:func:`ranked_lists`,
    with its weights: a partner's group counts min(top_k + 1, its size) rows, a group's own
    members as many rows of 1.0).

    A pair kept by neither side lies below both sides' cut, or at a side's cut behind the
    partners that fill its list there (ties are broken by neighbour id): dropping it changes
    no list, and the cut of a side is reached at the same value without it. Given only some
    of the pairs (a block of parts), a side's cut can only be lower than with all of them,
    and at the same cut the room left no larger, so the pairs dropped are still dropped with
    all of them."""
    return list_cuts(left, right, jaccard, group_sizes, top_k)[0]


def list_cuts(left: np.ndarray, right: np.ndarray, jaccard: np.ndarray, group_sizes: np.ndarray,
              top_k: int) -> tuple[np.ndarray, np.ndarray]:
    """(:func:`pairs_in_lists`, each representative's cut): the Jaccard below which no pair
    can enter its list given these pairs, -1.0 where its list is not yet full (1.0 for a group
    of more than ``top_k`` members, whose own rows fill it). More pairs only raise a cut, so
    it is a floor for the cut of the whole run: a pair below both its sides' floors is
    dropped whatever pairs come later."""
    cap = top_k + 1
    keep = np.zeros(len(left), dtype=np.bool_)
    cutoffs = own_cuts(group_sizes, top_k)
    if len(left) == 0:
        return keep, cutoffs
    groups = int(max(left.max(), right.max())) + 1
    tasks = max(1, min(numba.get_num_threads(), len(left) // SIDE_TASK))
    starts, pair = _by_side(np.ascontiguousarray(left, dtype=np.int64), np.ascontiguousarray(right, dtype=np.int64),
                            groups, tasks)
    capped = np.minimum(cap, np.asarray(group_sizes[:groups], dtype=np.int64))
    _cut_both(starts, pair, np.ascontiguousarray(left, dtype=np.int64), np.ascontiguousarray(right, dtype=np.int64),
              np.ascontiguousarray(jaccard, dtype=np.float64), capped, cap, keep, cutoffs[:groups])
    return keep, cutoffs


def own_cuts(group_sizes: np.ndarray, top_k: int) -> np.ndarray:
    """Each representative's cut before any pair (:func:`list_cuts`): 1.0 for a group of more
    than ``top_k`` members, -1.0 otherwise."""
    return np.where(np.asarray(group_sizes) > top_k, 1.0, -1.0)
