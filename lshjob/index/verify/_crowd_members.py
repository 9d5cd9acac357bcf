"""The layout of crowds' members for :mod:`lshjob.index.verify._crowds`: each member's crowd a
band, members by set size within a crowd, and the top-k floors of a range of entity ids."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba


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
