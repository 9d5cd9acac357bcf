"""Exact Jaccard similarity of pairs of sets of one CSR (the sample profile's similar pairs)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba


@numba.njit(parallel=True, cache=True)
def pair_jaccard(offsets, elements, left, right):
    """|A & B| / |A | B| of the sets ``left[i]`` and ``right[i]`` (sorted element codes,
    ``elements[offsets[i]:offsets[i + 1]]``), by merging the two sorted runs."""
    out = np.empty(len(left), dtype=np.float64)
    for i in numba.prange(len(left)):
        a, a_end = offsets[left[i]], offsets[left[i] + 1]
        b, b_end = offsets[right[i]], offsets[right[i] + 1]
        size = (a_end - a) + (b_end - b)
        inter = 0
        while a < a_end and b < b_end:
            x, y = elements[a], elements[b]
            if x == y:
                inter += 1
                a += 1
                b += 1
            elif x < y:
                a += 1
            else:
                b += 1
        out[i] = inter / (size - inter) if size > inter else 1.0
    return out
