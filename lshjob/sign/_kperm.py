"""Compiled kernel of scheme ``kperm`` over sets in CSR form (:mod:`lshjob.sign._fold`)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.sets import element_hash, store_row
from lshjob.sign._fold import CHUNK, EMPTY, fold_kperm


@numba.njit(parallel=True, cache=True)
def sign_kperm(offsets, codes, table, ids, salts, by_position):
    """Sets ids[t] of a CSR element array (elements as in :func:`lshjob.core.sets.element_hash`);
    (len(ids) x k), or (k x len(ids)) ``by_position``, k = len(salts)."""
    n = ids.shape[0]
    k = salts.shape[0]
    # filled a chunk at a time in parallel, so pages are first touched by the threads
    out = np.empty((k, n) if by_position else (n, k), dtype=np.uint64)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        row = np.empty(k, dtype=np.uint64)
        for t in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
            g = ids[t]
            row[:] = EMPTY
            for j in range(offsets[g], offsets[g + 1]):
                fold_kperm(element_hash(j, codes, table), salts, k, row)
            store_row(out, t, row, by_position)
    return out
