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
unbiased estimate of Jaccard. The first 32 probes of every bin are tabled once per call
(they depend only on the seed); later probes are computed as needed.
"""

from __future__ import annotations

import numba
import numpy as np

from .hashing import fmix64
from .membership import element_hash, store_row

EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)
CHUNK = 256  # sets per parallel task


@numba.njit(inline="always")
def fast_range(h, k):
    return ((h >> np.uint64(32)) * np.uint64(k)) >> np.uint64(32)


@numba.njit(parallel=True, cache=True)
def sign_oph(offsets, codes, table, ids, k, salts):
    """Stored (not densified) signatures of the sets ids[t] of a CSR element array (elements
    as in :func:`lshjob.membership.element_hash`)."""
    n = ids.shape[0]
    out = np.empty((n, k), dtype=np.uint64)  # filled a chunk at a time: pages first touched in parallel
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        for t in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            g = ids[t]
            row = out[t]
            row[:] = EMPTY
            for j in range(offsets[g], offsets[g + 1]):
                x = element_hash(j, codes, table)
                b = fast_range(fmix64(x ^ salts[0]), k)
                v = fmix64(x ^ salts[1])
                if v < row[b]:
                    row[b] = v
    return out


PROBE_TABLE_DEPTH = 32


@numba.njit(inline="always")
def _probe(salt, i, a, k):
    return fast_range(fmix64(salt ^ ((np.uint64(i) << np.uint64(32)) | np.uint64(a))), k)


@numba.njit(cache=True)
def probe_table(salt, k, depth):
    """The first ``depth`` probes of every bin: they depend only on the seed, so they are
    computed once per call instead of once per empty bin of every set."""
    table = np.empty((k, depth), dtype=np.int64)
    for i in range(k):
        for a in range(depth):
            table[i, a] = _probe(salt, i, a + 1, k)
    return table


@numba.njit(parallel=True, cache=True)
def densify(signatures, salt, by_position):
    """Densified copy of (n x k) stored signatures; (k x n) when ``by_position``."""
    n, k = signatures.shape
    out = np.empty((k, n) if by_position else (n, k), dtype=np.uint64)
    table = probe_table(salt, k, PROBE_TABLE_DEPTH)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        filled_row = np.empty(k, dtype=np.uint64)
        for g in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            row = signatures[g]
            filled_row[:] = row
            filled = 0
            for i in range(k):
                if row[i] != EMPTY:
                    filled += 1
            if 0 < filled < k:
                for i in range(k):
                    if row[i] == EMPTY:
                        filled_row[i] = _borrow(row, table, salt, i, k)
            store_row(out, g, filled_row, by_position)
    return out


@numba.njit(inline="always")
def _borrow(row, table, salt, i, k):
    """The value an empty bin i takes: that of its first non-empty probe."""
    for a in range(PROBE_TABLE_DEPTH):
        v = row[table[i, a]]
        if v != EMPTY:
            return v
    a = PROBE_TABLE_DEPTH + 1
    while True:  # rare: every tabled probe hit an empty bin
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
