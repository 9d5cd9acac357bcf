"""One-permutation hashing with optimal densification (scheme ``oph``).

Signing (Li, Owen and Zhang, "One Permutation Hashing", NeurIPS 2012): each element is
hashed once; its bin is ``fast_range(fmix64(h0 XOR salt[0]), k)`` (Lemire's multiply-shift
range reduction) and its value ``fmix64(h0 XOR salt[1])``; a set's signature holds the
minimum value per bin, and ``EMPTY`` (2**64 - 1) for bins no element fell in. One hash per
element instead of k.

Stored signatures keep empty bins as ``EMPTY``, so the element-wise minimum of two
signatures is still the signature of the union (an empty bin stays empty only if it is
empty in both). Densification is applied where signatures are compared or banded, never
before storing or merging.

Densification (Shrivastava, "Optimal Densification for Fast and Accurate Minwise
Hashing", ICML 2017): an empty bin i takes the value of bin j for the first attempt
a = 1, 2, ... whose probe ``j = fast_range(fmix64(salt[2] XOR (i << 32 | a)), k)`` is not
empty. The probe sequence depends only on (i, a) and the seed, so two sets that agree on
the borrowed bin agree on the filled one, and the fraction of equal positions stays an
unbiased estimate of Jaccard.

The probes depend only on the seed, so they are worked out once per call. For k up to 512,
each bin's first 1024 probes are ranked: ``ranks[i, j]`` holds the attempt at which bin i
first probes bin j (with j in its low bits), and an empty bin's first non-empty probe is
the smallest rank among the non-empty bins, a minimum over k keys with no branch per
probe; beyond 1024 attempts (a set with one element: about 1 bin in 3,000 at k=128) the
probes go on in order. For larger k the first 32 probes of every bin are tabled instead.
"""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.compile_cache import readonly
from lshjob.core.hashing import fmix64
from lshjob.core.sets import element_hash, store_row

EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)
CHUNK = 256  # sets per parallel task


@numba.njit(inline="always")
def fast_range(h, k):
    return ((h >> np.uint64(32)) * np.uint64(k)) >> np.uint64(32)


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
        x = element_hash(j, codes, table)
        b = fast_range(fmix64(x ^ salts[0]), k)
        v = fmix64(x ^ salts[1])
        if v < row[b]:
            row[b] = v


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


def densify(signatures, salt, by_position):
    """Densified copy of (n x k) stored signatures; (k x n) when ``by_position``. The
    signatures go in read-only, so one compiled kernel serves arrays read from files and
    arrays just made."""
    return _densify(readonly(signatures), salt, by_position)


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


ESTIMATE_ROWS = 65536  # rows at a time in the set size estimates (here and in signatures.py)


def set_size_estimate(signatures: np.ndarray) -> np.ndarray:
    """Distinct count from OPH bins: linear counting -k ln(empty/k) while bins are empty
    (Whang, Vander-Zanden, Taylor, "A linear-time probabilistic counting algorithm for
    database applications", TODS 1990); with no empty bin, each bin's minimum is that of
    about n/k uniforms, and (k-1)/sum(u) estimates n/k for each (Cohen 1997; from memory)."""
    k = signatures.shape[1]
    n = signatures.shape[0]
    empty = np.empty(n, dtype=np.int64)
    sums = np.empty(n, dtype=np.float64)
    for a in range(0, n, ESTIMATE_ROWS):  # blocks: no full-size float copies
        block = signatures[a:a + ESTIMATE_ROWS]
        u = (block.astype(np.float64) + 1.0) / 2.0**64
        u[block == EMPTY] = 0.0
        empty[a:a + ESTIMATE_ROWS] = (block == EMPTY).sum(axis=1)
        sums[a:a + ESTIMATE_ROWS] = u.sum(axis=1)
    with np.errstate(divide="ignore"):
        linear = -k * np.log(np.maximum(empty, 1) / k)
        full = k * (k - 1) / np.maximum(sums, 1e-300)
    return np.maximum(1.0, np.where(empty > 0, linear, full))
