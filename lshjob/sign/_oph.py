"""Compiled kernels of scheme ``oph`` (:mod:`lshjob.sign.oph` describes the scheme): signing
over sets in CSR form (the per-element fold is :func:`lshjob.sign._fold.fold_oph`), and
densification with its probe tables."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64
from lshjob.core.sets import element_hash, store_row
from lshjob.sign._fold import CHUNK, EMPTY, fast_range, fold_oph


@numba.njit(parallel=True, cache=True)
def sign_oph(offsets, codes, table, ids, k, salts):
    """Stored (not densified) signatures of the sets ids[t] of a CSR element array (elements
    as in :func:`lshjob.core.sets.element_hash`)."""
    n = ids.shape[0]
    out = np.empty((n, k), dtype=np.uint64)  # filled a chunk at a time: pages first touched in parallel
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        for t in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            _sign_row(offsets, codes, table, ids[t], k, salts, out[t])
    return out


@numba.njit(parallel=True, cache=True)
def sign_densified(offsets, codes, table, ids, k, salts, positions):
    """The first ``positions`` positions of the densified signatures of the sets ids[t],
    laid out by position (positions x n): :func:`sign_oph` then :func:`densify`, a row at a
    time in cache (no stored matrix), and only the bins the caller reads are filled."""
    n = ids.shape[0]
    out = np.empty((positions, n), dtype=np.uint64)
    ranks, probes = _probe_tables(salts[2], k)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        raw = np.empty(k, dtype=np.uint64)
        dense = np.empty(k, dtype=np.uint64)
        mask = np.empty(k, dtype=np.uint32)
        for t in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            _sign_row(offsets, codes, table, ids[t], k, salts, raw)
            _densify_row(raw, dense, mask, ranks, probes, salts[2], k, positions)
            for i in range(positions):
                out[i, t] = dense[i]
    return out


@numba.njit(inline="always")
def _sign_row(offsets, codes, table, g, k, salts, row):
    row[:] = EMPTY
    for j in range(offsets[g], offsets[g + 1]):
        fold_oph(element_hash(j, codes, table), salts, k, row)


@numba.njit(inline="always")
def _probe(salt, i, a, k):
    return fast_range(fmix64(salt ^ ((np.uint64(i) << np.uint64(32)) | np.uint64(a))), k)


PROBE_TABLE_DEPTH = 32
RANKED_PROBES = 1024  # probes ranked per bin (module docstring); more are computed as needed
RANKED_MAX_K = 512  # k x k ranks of 4 bytes: 1 MiB at k = 512; larger k probes in order
NO_RANK = np.uint32(0xFFFFFFFF)
BIN_BITS = 12  # bits of a rank key that hold the bin (k <= 512 < 2**12)


@numba.njit(cache=True)
def rank_table(salt, k, depth):
    """``ranks[i, j]``: for the first probe a (1..depth) of bin i that lands on bin j,
    ``a << BIN_BITS | j``; NO_RANK when none does. The smallest key among the non-empty bins
    j is bin i's first non-empty probe. Depends only on the seed: made once per call."""
    ranks = np.full((k, k), NO_RANK, dtype=np.uint32)
    for i in range(k):
        for a in range(1, depth + 1):
            j = _probe(salt, i, a, k)
            if ranks[i, j] == NO_RANK:
                ranks[i, j] = np.uint32((a << BIN_BITS) | j)
    return ranks


@numba.njit(cache=True)
def probe_table(salt, k, depth):
    """The first ``depth`` probes of every bin (for k too large for :func:`rank_table`)."""
    table = np.empty((k, depth), dtype=np.int64)
    for i in range(k):
        for a in range(depth):
            table[i, a] = _probe(salt, i, a + 1, k)
    return table


@numba.njit(cache=True)
def _probe_tables(salt, k):
    if k <= RANKED_MAX_K:
        return rank_table(salt, k, RANKED_PROBES), np.empty((0, 0), dtype=np.int64)
    return np.empty((0, 0), dtype=np.uint32), probe_table(salt, k, PROBE_TABLE_DEPTH)



@numba.njit(parallel=True, cache=True)
def _densify(signatures, salt, by_position):
    n, k = signatures.shape
    out = np.empty((k, n) if by_position else (n, k), dtype=np.uint64)
    ranks, probes = _probe_tables(salt, k)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        dense = np.empty(k, dtype=np.uint64)
        mask = np.empty(k, dtype=np.uint32)
        for g in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            _densify_row(signatures[g], dense, mask, ranks, probes, salt, k, k)
            store_row(out, g, dense, by_position)
    return out


@numba.njit(inline="always")
def _densify_row(row, dense, mask, ranks, probes, salt, k, positions):
    """``dense``: ``row`` with every empty bin below ``positions`` filled by its first
    non-empty probe (module docstring). With ``ranks``, that probe is a minimum over the
    non-empty bins' rank keys (no branch per probe, vectorised); ``mask`` is scratch."""
    filled = 0
    for j in range(k):
        if row[j] == EMPTY:
            mask[j] = NO_RANK
        else:
            mask[j] = np.uint32(0)
            filled += 1
    for j in range(k):  # not ``dense[:] = row``: that compiles numba's shape-mismatch error
        dense[j] = row[j]
    if filled == 0 or filled == k:
        return
    for i in range(positions):
        if row[i] != EMPTY:
            continue
        if ranks.shape[0] > 0:
            best = NO_RANK
            for j in range(k):
                best = min(best, np.uint32(ranks[i, j] | mask[j]))  # 32-bit lanes: twice as many
            if best != NO_RANK:
                dense[i] = row[best & np.uint32((1 << BIN_BITS) - 1)]
            else:  # rare: none of the ranked probes is non-empty
                dense[i] = _probe_from(row, salt, i, k, RANKED_PROBES + 1)
        else:
            dense[i] = _borrow(row, probes, salt, i, k)


@numba.njit(inline="always")
def _borrow(row, table, salt, i, k):
    """The value an empty bin i takes: that of its first non-empty probe (tabled ones first)."""
    for a in range(PROBE_TABLE_DEPTH):
        v = row[table[i, a]]
        if v != EMPTY:
            return v
    return _probe_from(row, salt, i, k, PROBE_TABLE_DEPTH + 1)


@numba.njit(inline="always")
def _probe_from(row, salt, i, k, a):
    while True:
        v = row[_probe(salt, i, a, k)]
        if v != EMPTY:
            return v
        a += 1
