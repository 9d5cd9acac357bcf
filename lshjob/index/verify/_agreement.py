"""Compiled count of equal signature positions of pairs (the verified pairs' estimate)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba


def signature_agreement(left_signatures, left_row, left, right_signatures, right_row, right):
    """Fraction of equal positions of the signature rows ``left_row[left[p]]`` and
    ``right_row[right[p]]`` of two (n x k) matrices (:func:`add_equal_positions`, divided by k)."""
    equal = np.zeros(left.shape[0], dtype=np.int64)
    add_equal_positions(equal, left_signatures, left_row, left, right_signatures, right_row, right,
                        np.arange(left.shape[0], dtype=np.int64))
    return equal / left_signatures.shape[1]


@numba.njit(parallel=True, cache=True)
def add_equal_positions(counts, left_signatures, left_row, left, right_signatures, right_row, right, at):
    """``counts[at[p]] +=`` the equal positions of the signature rows ``left_row[left[p]]`` and
    ``right_row[right[p]]`` (two matrices of the same positions); ``at`` distinct."""
    k = left_signatures.shape[1]
    for p in numba.prange(left.shape[0]):
        a, b = left_row[left[p]], right_row[right[p]]
        eq = 0
        for i in range(k):
            if left_signatures[a, i] == right_signatures[b, i]:
                eq += 1
        counts[at[p]] += eq
