"""Compiled kernel signing grouped events (:mod:`lshjob.sign.events`): each set's codes are
read once, a code already seen in the set is skipped (a table of the set's codes, stamped
with its number), and each new one is hashed and folded (:func:`lshjob.sign._fold.fold_element`)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.hashing import GOLDEN
from lshjob.core.sets import element_hash
from lshjob.sign._fold import CHUNK, EMPTY, fold_element

SLOT_MULTIPLIER = np.uint64(GOLDEN)  # a code to its slot: multiplicative hashing (odd, 2**64 over the golden ratio)


@numba.njit(parallel=True, cache=True)
def sign_grouped(offsets, codes, text_hashes, salts, k, oph_scheme):
    """Signatures (n x k) and distinct counts of the sets ``codes[offsets[g]:offsets[g + 1]]``."""
    n = offsets.shape[0] - 1
    out = np.empty((n, k), dtype=np.uint64)
    sizes = np.zeros(n, dtype=np.int64)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        _sign_chunk(c * CHUNK, min(n, (c + 1) * CHUNK), offsets, codes, text_hashes, salts, k, oph_scheme, out, sizes)
    return out, sizes


@numba.njit(cache=True)
def _sign_chunk(lo, hi, offsets, codes, text_hashes, salts, k, oph_scheme, out, sizes):
    """Sets lo..hi-1 (one task: its own table); rows filled in place."""
    largest = 1
    for g in range(lo, hi):
        largest = max(largest, offsets[g + 1] - offsets[g])
    bits = 6
    while (1 << bits) < 2 * largest:
        bits += 1
    seen = np.empty(1 << bits, dtype=np.int64)
    stamp = np.zeros(1 << bits, dtype=np.int64)  # a slot holds a code of set g iff stamp == g + 1
    for g in range(lo, hi):
        a, b = offsets[g], offsets[g + 1]
        bits = 6
        while (1 << bits) < 2 * (b - a):
            bits += 1
        mask = (1 << bits) - 1
        row = out[g]
        row[:] = EMPTY
        count = 0
        for j in range(a, b):
            x = codes[j]
            s = np.int64((np.uint64(x) * SLOT_MULTIPLIER) >> np.uint64(64 - bits))
            new = True
            while stamp[s] == g + 1:
                if seen[s] == x:
                    new = False
                    break
                s = (s + 1) & mask
            if not new:
                continue
            stamp[s] = g + 1
            seen[s] = x
            count += 1
            fold_element(element_hash(j, codes, text_hashes), salts, k, oph_scheme, row)
        sizes[g] = count
