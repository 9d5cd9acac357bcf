"""The layout of crowds' members for :mod:`lshjob.index.verify._crowds`: each member's crowd a
band, members by set size within a crowd, the top-k floors of a range of entity ids and how a
crowd raises them, and the sets as the kernels read them."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.compile_cache import readonly


def floor_within(floors, first: int, sets: int) -> np.ndarray:
    """The floors of entity ids first..first + sets - 1 (-1.0 beyond those known), or an
    empty array without ``floors``."""
    if floors is None:
        return np.empty(0)
    known = np.asarray(floors(), dtype=np.float64)[first:first + sets]  # a view (no copy: once a chunk)
    return known if len(known) == sets else np.concatenate([known, np.full(sets - len(known), -1.0)])


def crowds_by_band(members: np.ndarray, crowd: np.ndarray, band: np.ndarray | None, start: np.ndarray, first: int,
                    sets: int):
    """Each member's crowd a band (a matrix, a row a member, 0 where none; int32: crowds have 3
    members or more), the bands (mod 64) it has a crowd in (bits), each entity id's row (from
    ``first``; -1 for none), and each crowd's band (-1 for all when the bands are not known)."""
    if band is None:
        return (np.zeros((1, 1), dtype=np.int32), np.zeros(1, dtype=np.uint64), np.zeros(1, dtype=np.int64),
                np.full(len(start), -1, dtype=np.int64))
    band = np.ascontiguousarray(band, dtype=np.int64)
    crowd_at, in_bands, row_of = _band_rows(np.ascontiguousarray(members - first, dtype=np.int64),
                                            np.ascontiguousarray(crowd, dtype=np.int64), band, sets,
                                            int(band.max()) + 1)
    return crowd_at, in_bands, row_of, np.ascontiguousarray(band[start], dtype=np.int64)


@numba.njit(cache=True)
def _band_rows(local, crowd, band, sets, bands):
    """:func:`crowds_by_band`'s matrix, bits and rows in two passes (rows in order of first
    appearance)."""
    row_of = np.full(sets, -1, dtype=np.int64)
    rows = 0
    for m in range(len(local)):
        if row_of[local[m]] < 0:
            row_of[local[m]] = rows
            rows += 1
    crowd_at = np.zeros((rows, bands), dtype=np.int32)  # crowd ids: 1..crowds, each of 3 members or more
    in_bands = np.zeros(rows, dtype=np.uint64)
    for m in range(len(local)):
        r = row_of[local[m]]
        crowd_at[r, band[m]] = crowd[m]
        in_bands[r] |= np.uint64(1) << np.uint64(band[m] % 64)
    return crowd_at, in_bands, row_of


def by_size(members: np.ndarray, crowd: np.ndarray, sets, first: int) -> np.ndarray:
    """``members`` (grouped by ``crowd``) reordered by set size, then id, within each crowd."""
    out = np.ascontiguousarray(members, dtype=np.int64).copy()
    if len(out):
        crowd = np.ascontiguousarray(crowd, dtype=np.int64)
        bounds = np.flatnonzero(np.concatenate([[True], crowd[1:] != crowd[:-1], [True]])).astype(np.int64)
        _sort_by_size(out, bounds, sets.offsets, first)
    return out


@numba.njit(parallel=True, cache=True)
def _sort_by_size(members, bounds, offsets, first):
    """Sort each run ``members[bounds[g]:bounds[g + 1]]`` by (set size, id), in place."""
    for g in numba.prange(len(bounds) - 1):
        lo, hi = bounds[g], bounds[g + 1]
        key = np.empty(hi - lo, dtype=np.int64)
        for m in range(lo, hi):
            key[m - lo] = ((offsets[members[m] - first + 1] - offsets[members[m] - first]) << 32) | (members[m] - first)
        key.sort()
        for m in range(lo, hi):
            members[m] = (key[m - lo] & 0xFFFFFFFF) + first


def weight_within(group_sizes, top_k: int | None, first: int, sets: int) -> np.ndarray:
    """The rows each set of entity ids first..first + sets - 1 brings a list, min(top_k + 1,
    its group's size) (:func:`lshjob.index._ranking.list_cuts`), or an empty array without a
    top-k."""
    if group_sizes is None or top_k is None:
        return np.empty(0, dtype=np.int64)
    return np.minimum(top_k + 1, np.asarray(group_sizes[first:first + sets], dtype=np.int64))


BINS = 64  # bins of [threshold, 1] a crowd tallies each member's pairs in (rise)


@numba.njit(inline="always")
def may_reach(la, lb, sought, distinct):
    """Whether sets of sizes ``la`` >= ``lb`` can reach Jaccard ``sought``: ``distinct`` sets of
    one size share at most all but one element, the value (la - 1) / (la + 1) as the kernels
    divide it."""
    return not distinct or la != lb or (la - 1) / (la + 1) >= sought


@numba.njit(cache=True)
def list_tallies(mem, first, weight, cap, rising):
    """A crowd's tallies for :func:`rise`: each member's rows found a bin, its floor bin, the
    rows in that bin and above, and the rows its list takes from partners (``cap`` less its own
    group's, when it has members)."""
    m = len(mem) if rising else 0
    tally = np.zeros((m, BINS), dtype=np.int64)
    need = np.empty(m, dtype=np.int64)
    for x in range(m):
        own = weight[mem[x] - first]
        need[x] = cap - (own if own > 1 else 0)
    return tally, np.zeros(m, dtype=np.int64), np.zeros(m, dtype=np.int64), need


@numba.njit(inline="always")
def _edge(b, threshold):
    return threshold + b * ((1.0 - threshold) / BINS)


@numba.njit(inline="always")
def _tally_side(s, w, b, threshold, tally, top, above, need, at):
    if need[s] <= 0 or b < top[s]:
        return
    tally[s, b] += w
    above[s] += w
    while top[s] + 1 < BINS and above[s] - tally[s, top[s]] >= need[s]:
        above[s] -= tally[s, top[s]]
        top[s] += 1
    if above[s] >= need[s]:
        at[s] = max(at[s], _edge(top[s], threshold))


@numba.njit(inline="always")
def rise(x, y, value, threshold, mem, first, weight, tally, top, above, need, at):
    """Pair (x, y) of a crowd found at ``value``: each side tallies the rows its partner's
    group brings in value's bin of [threshold, 1], and once the rows in its floor bin and
    above fill its list, that bin's lower edge is a floor for it (``at``): each of those rows
    is at the edge or above, so a pair below it ranks behind a full list and enters it with
    no other pair (:func:`lshjob.index._ranking.list_cuts`'s floors, from the crowd's pairs)."""
    b = min(max(int((value - threshold) / max(1.0 - threshold, 1e-12) * BINS), 0), BINS - 1)
    while b > 0 and _edge(b, threshold) > value:
        b -= 1
    while b + 1 < BINS and _edge(b + 1, threshold) <= value:
        b += 1
    _tally_side(x, weight[mem[y] - first], b, threshold, tally, top, above, need, at)
    _tally_side(y, weight[mem[x] - first], b, threshold, tally, top, above, need, at)


@numba.njit(cache=True)
def member_floors(mem, first, floor, threshold):
    """Each member's floor, at least the threshold (``floor`` by entity id from ``first``; empty
    for none), and the lowest of them."""
    at = np.full(len(mem), threshold)
    if len(floor) == 0:
        return at, threshold
    lowest = 1.0
    for x in range(len(mem)):
        at[x] = max(threshold, floor[mem[x] - first])
        lowest = min(lowest, at[x])
    return at, lowest


def read_only(sets):
    """``sets`` with read-only views of its offsets and elements (:func:`lshjob.core.compile_cache.readonly`)."""
    return replace(sets, offsets=readonly(sets.offsets), elements=readonly(sets.elements))
