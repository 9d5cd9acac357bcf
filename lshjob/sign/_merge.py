"""Compiled kernel of merging signatures (:func:`lshjob.sign.signatures.merge_signatures`)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba

READONLY_MATRIX = numba.types.Array(numba.types.uint64, 2, "C", readonly=True)


@numba.njit(parallel=True, cache=True)
def minimum_by_run(matrices, firsts, rows, starts, lengths, k):
    """Row g of the result: the element-wise minimum of the rows ``rows[starts[g]:starts[g] +
    lengths[g]]`` of the stacked matrices (matrix t holds rows firsts[t]..firsts[t + 1] - 1)."""
    out = np.empty((starts.shape[0], k), dtype=np.uint64)
    for g in numba.prange(starts.shape[0]):
        row = out[g]
        for j in range(starts[g], starts[g] + lengths[g]):
            r = rows[j]
            t = np.searchsorted(firsts, r, side="right") - 1
            source = matrices[t][r - firsts[t]]
            if j == starts[g]:
                row[:] = source
            else:
                for i in range(k):
                    row[i] = min(row[i], source[i])
    return out


def matrix_list():
    """An empty list for :func:`minimum_by_run`'s input matrices (read-only: polars' buffers are)."""
    return numba.typed.List.empty_list(READONLY_MATRIX)
