"""Publishing's compiled and numpy helpers: each representative's list ranked and cut
(:func:`top_rows`), and a member's rows gathered from its representative's list by position
(:func:`gathered`, :func:`ranks`)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba


@numba.njit(cache=True)
def _grouped(src, first, groups):
    """Rows by ``src`` (a counting sort; values first..first + groups - 1): (starts, order)."""
    counts = np.zeros(groups + 1, dtype=np.int64)
    for s in src:
        counts[s - first + 1] += 1
    starts = np.cumsum(counts)
    fill = starts[:-1].copy()
    order = np.empty(len(src), dtype=np.int64)
    for i in range(len(src)):
        g = src[i] - first
        order[fill[g]] = i
        fill[g] += 1
    return starts, order


@numba.njit(inline="always")
def _before(x, y, jaccard, neighbour):
    """Row x ranks before row y: higher Jaccard, or the same and a smaller neighbour."""
    return jaccard[x] > jaccard[y] or (jaccard[x] == jaccard[y] and neighbour[x] < neighbour[y])


@numba.njit(parallel=True, cache=True)
def _ranked(starts, order, jaccard, neighbour, cap, out_starts, out_rows):
    """Each group's first ``cap`` rows by Jaccard descending, ties by neighbour ascending,
    written in rank order at ``out_starts[g]``: an insertion into the sorted first ``cap``
    (the output slice itself), so a row that does not enter costs one comparison."""
    for g in numba.prange(len(starts) - 1):
        out = out_starts[g]
        held = 0
        for i in range(starts[g], starts[g + 1]):
            row = order[i]
            if held == cap and not _before(row, out_rows[out + cap - 1], jaccard, neighbour):
                continue
            at = held if held < cap else cap - 1  # the place of the new row, moved up
            while at > 0 and _before(row, out_rows[out + at - 1], jaccard, neighbour):
                if at < cap:
                    out_rows[out + at] = out_rows[out + at - 1]
                at -= 1
            out_rows[out + at] = row
            held = min(held + 1, cap)


def by_value(values: np.ndarray, bound: int) -> np.ndarray:
    """The positions of ``values`` (0..bound-1) ordered by value, stably (a counting sort:
    the same order as ``np.argsort(values, kind="stable")``, in linear time)."""
    return _grouped(np.ascontiguousarray(values), 0, bound)[1]


def top_rows(src: np.ndarray, jaccard: np.ndarray, neighbour: np.ndarray, first: int, groups: int,
             cap: int) -> np.ndarray:
    """Positions of the rows that make each ``src``'s list (values first..first + groups - 1):
    its rows ranked by Jaccard descending, ties by neighbour ascending (neighbours distinct
    within a ``src``), cut at ``cap``; in order of ``src``, then rank. The same rows and order
    as a sort by (src, -jaccard, neighbour) and the first ``cap`` of each src, without
    sorting across lists."""
    starts, order = _grouped(np.ascontiguousarray(src), first, groups)
    kept = np.minimum(np.diff(starts), cap)
    out_starts = np.concatenate([[0], np.cumsum(kept)]).astype(np.int64)
    out_rows = np.empty(int(out_starts[-1]), dtype=np.int64)
    _ranked(starts, order, np.ascontiguousarray(jaccard, dtype=np.float64), np.ascontiguousarray(neighbour),
            cap, out_starts, out_rows)
    return out_rows


def gathered(ids: np.ndarray, first: np.ndarray, lengths: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each of ``ids`` repeated ``lengths`` times, and beside it the positions
    ``first .. first + length - 1`` of its rows."""
    total = int(lengths.sum())
    starts = np.cumsum(lengths) - lengths
    at = np.arange(total, dtype=np.int64) + np.repeat(first.astype(np.int64) - starts, lengths)
    return np.repeat(ids, lengths), at


def ranks(owner: np.ndarray) -> np.ndarray:
    """1, 2, ... within each run of equal ``owner`` values."""
    if len(owner) == 0:
        return np.zeros(0, dtype=np.int64)
    new = np.concatenate([[True], owner[1:] != owner[:-1]])
    firsts = np.flatnonzero(new)
    return np.arange(len(owner)) - np.repeat(firsts, np.diff(np.append(firsts, len(owner)))) + 1


@numba.njit(parallel=True, cache=True)
def _cut(starts, order, jaccard, weight, own, cap, keep):
    """Per group: the edges a list of ``cap`` can take rows from. An edge brings ``weight``
    rows of its Jaccard (a group's head), ``own[g]`` rows of 1.0 come first; once ``cap`` rows
    are reached at value v, no row below v can enter, so edges below v are dropped (those at
    v stay: their ties are broken by neighbour later)."""
    for g in numba.prange(len(starts) - 1):
        rows = order[starts[g]:starts[g + 1]]
        if len(rows) == 0:
            continue
        cutoff = -1.0
        if own[g] >= cap:
            cutoff = 1.0
        elif own[g] + weight[rows].sum() >= cap:  # else the list never fills: every edge counts
            values = jaccard[rows]
            held = own[g]
            for i in np.argsort(-values, kind="mergesort"):
                held += weight[rows[i]]
                if held >= cap:
                    cutoff = values[i]
                    break
        for r in rows:
            keep[r] = jaccard[r] >= cutoff


def edges_that_count(src: np.ndarray, jaccard: np.ndarray, weight: np.ndarray, own: np.ndarray, first: int,
                     groups: int, cap: int) -> np.ndarray:
    """Which edges can bring a row into their ``src``'s first ``cap`` (:func:`_cut`): the rows
    of the others rank below ``cap`` rows of the kept ones, so ranking only the kept edges'
    rows gives the same lists."""
    starts, order = _grouped(np.ascontiguousarray(src), first, groups)
    keep = np.zeros(len(src), dtype=np.bool_)
    _cut(starts, order, np.ascontiguousarray(jaccard, dtype=np.float64), np.ascontiguousarray(weight, dtype=np.int64),
         np.ascontiguousarray(own, dtype=np.int64), cap, keep)
    return keep


@numba.njit(cache=True)
def _by_side(left, right, groups):
    """Each pair under both its sides (a counting sort): (starts, pair) with the pairs of
    side g at ``pair[starts[g]:starts[g + 1]]``."""
    starts = np.zeros(groups + 1, dtype=np.int64)
    for p in range(len(left)):
        starts[left[p] + 1] += 1
        starts[right[p] + 1] += 1
    for g in range(groups):
        starts[g + 1] += starts[g]
    fill = starts[:-1].copy()
    pair = np.empty(2 * len(left), dtype=np.int64)
    for p in range(len(left)):
        pair[fill[left[p]]] = p
        fill[left[p]] += 1
        pair[fill[right[p]]] = p
        fill[right[p]] += 1
    return starts, pair


@numba.njit(parallel=True, cache=True)
def _cut_both(starts, pair, left, right, jaccard, capped, cap, keep):
    """For each side g, the rule of :func:`_cut` over the pairs of g (a partner's group brings
    ``capped`` rows, g's own group ``capped[g]`` rows of 1.0 when it has members): a pair at
    or above the value where ``cap`` rows are reached is kept (by either side: ``keep`` is
    only ever set). Every pair brings a row or more, so that value lies among the side's
    ``cap`` highest: they are held sorted (an insertion, one comparison for a pair that does
    not enter), not the whole side."""
    for g in numba.prange(len(starts) - 1):
        lo, hi = starts[g], starts[g + 1]
        if lo == hi:
            continue
        own = capped[g] if capped[g] > 1 else 0
        cutoff = -1.0
        if own >= cap:
            cutoff = 1.0
        else:
            values = np.empty(cap, dtype=np.float64)  # the highest values, descending
            weights = np.empty(cap, dtype=np.int64)
            held = 0
            total = own
            for i in range(lo, hi):
                p = pair[i]
                w = capped[right[p] if left[p] == g else left[p]]
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
                        cutoff = values[i]
                        break
        for i in range(lo, hi):
            p = pair[i]
            if jaccard[p] >= cutoff:
                keep[p] = True


def pairs_in_lists(left: np.ndarray, right: np.ndarray, jaccard: np.ndarray, group_sizes: np.ndarray,
                   top_k: int) -> np.ndarray:
    """Which pairs of representatives (``left``, ``right``, their ``jaccard``; each pair once)
    can bring a row into the list publishing makes for either side (:func:`edges_that_count`
    on both directions, with the weights of :func:`lshjob.index.publish.expand`: a partner's
    group counts min(top_k + 1, its size) rows, a group's own members as many rows of 1.0).

    A pair kept by neither side lies below both sides' cut: dropping it changes no list,
    and the cut of a side is reached at the same value without it. Given only some of the
    pairs (a block of parts), a side's cut can only be lower than with all of them, so the
    pairs dropped are still below the cut of the whole run."""
    cap = top_k + 1
    keep = np.zeros(len(left), dtype=np.bool_)
    if len(left) == 0:
        return keep
    groups = int(max(left.max(), right.max())) + 1
    starts, pair = _by_side(np.ascontiguousarray(left, dtype=np.int64), np.ascontiguousarray(right, dtype=np.int64),
                            groups)
    capped = np.minimum(cap, np.asarray(group_sizes[:groups], dtype=np.int64))
    _cut_both(starts, pair, np.ascontiguousarray(left, dtype=np.int64), np.ascontiguousarray(right, dtype=np.int64),
              np.ascontiguousarray(jaccard, dtype=np.float64), capped, cap, keep)
    return keep
