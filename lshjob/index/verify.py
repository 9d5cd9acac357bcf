"""Verify stage: candidate pairs -> exact Jaccard from the element sets (not signatures).

Each candidate's sets are intersected by a merge of their sorted element ids (compiled,
both cores); the signature estimate (fraction of equal positions) is added for the pairs kept.

Output contract of :func:`verify_pairs`: DataFrame ``left_rep`` < ``right_rep`` (Int64),
``jaccard`` Float64 (exact: intersection / union of integer counts), ``estimate`` Float64,
``bands_shared`` Int32; only pairs with ``jaccard >= threshold``; in the
order of the candidates.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.sets import Membership
from lshjob.core.slicing import slice_bounds
from lshjob.sign.signatures import SignatureParams, comparable, sign_membership


@numba.njit(inline="always")
def _intersection(a_elements, a0, a1, b_elements, b0, b1, need):
    """|A n B| by merging sorted ids (A in ``a_elements[a0:a1]``, B in ``b_elements[b0:b1]``);
    stops early (returning a value below ``need``) once the rest of the shorter side can no
    longer lift the count to ``need``."""
    i, j, inter = a0, b0, 0
    while i < a1 and j < b1:
        if inter + min(a1 - i, b1 - j) < need:
            return inter
        x, y = a_elements[i], b_elements[j]
        if x == y:
            inter += 1
            i += 1
            j += 1
        elif x < y:
            i += 1
        else:
            j += 1
    return inter


@numba.njit(parallel=True, cache=True)
def exact_jaccard(offsets, elements, left, right):
    """Exact Jaccard of each pair (no filtering)."""
    n = left.shape[0]
    out = np.empty(n, dtype=np.float64)
    for p in numba.prange(n):
        a0, a1 = offsets[left[p]], offsets[left[p] + 1]
        b0, b1 = offsets[right[p]], offsets[right[p] + 1]
        inter = _intersection(elements, a0, a1, elements, b0, b1, 0)
        out[p] = inter / ((a1 - a0) + (b1 - b0) - inter)
    return out


def jaccard_at_least(offsets, elements, left, right, threshold):
    """Exact Jaccard where it reaches ``threshold``, -1.0 elsewhere (both sides in one CSR)."""
    return jaccard_between(offsets, elements, left, offsets, elements, right, threshold)


@numba.njit(parallel=True, cache=True)
def jaccard_between(left_offsets, left_elements, left, right_offsets, right_elements, right, threshold):
    """Exact Jaccard of set ``left[p]`` of the first CSR and ``right[p]`` of the second where
    it reaches ``threshold``, -1.0 elsewhere.

    Filters from all-pairs similarity search (Xiao, Wang, Lin, Yu, "Efficient similarity
    joins for near duplicate detection", WWW 2008): J(A, B) >= t needs
    min(|A|,|B|) >= t max(|A|,|B|) (size filter) and |A n B| >= t/(1+t) (|A|+|B|), so the
    merge stops once the remaining elements cannot reach that count.
    """
    n = left.shape[0]
    out = np.empty(n, dtype=np.float64)
    for p in numba.prange(n):
        a0, a1 = left_offsets[left[p]], left_offsets[left[p] + 1]
        b0, b1 = right_offsets[right[p]], right_offsets[right[p] + 1]
        la, lb = a1 - a0, b1 - b0
        if min(la, lb) < threshold * max(la, lb) - 1e-9:
            out[p] = -1.0
            continue
        need = int(np.ceil(threshold / (1.0 + threshold) * (la + lb) - 1e-9))
        inter = _intersection(left_elements, a0, a1, right_elements, b0, b1, need)
        jac = inter / (la + lb - inter)
        out[p] = jac if (inter >= need and jac >= threshold) else -1.0
    return out


@numba.njit(parallel=True, cache=True)
def signature_agreement(left_signatures, left_row, left, right_signatures, right_row, right):
    """Fraction of equal positions of the signature rows ``left_row[left[p]]`` and
    ``right_row[right[p]]`` of two (n x k) matrices."""
    n = left.shape[0]
    k = left_signatures.shape[1]
    out = np.empty(n, dtype=np.float64)
    for p in numba.prange(n):
        a, b = left_row[left[p]], right_row[right[p]]
        eq = 0
        for i in range(k):
            if left_signatures[a, i] == right_signatures[b, i]:
                eq += 1
        out[p] = eq / k
    return out


def verify_pairs(candidates: pl.DataFrame, sets: Membership, threshold: float) -> pl.DataFrame:
    """Exact Jaccard of each candidate; keep those >= threshold (``estimate`` is filled by
    :func:`add_estimates` once all candidates are verified)."""
    return verify_between(candidates, sets, 0, sets, 0, threshold)


def verify_between(candidates: pl.DataFrame, left_sets: Membership, left_first: int,
                   right_sets: Membership, right_first: int, threshold: float) -> pl.DataFrame:
    """:func:`verify_pairs` for candidates whose left entities are ``left_sets`` (entity id
    ``left_first + i`` is its set i) and right entities ``right_sets`` (from ``right_first``):
    the sets of a run held a key range at a time (:mod:`lshjob.jobs.parts`)."""
    left = np.ascontiguousarray(candidates["left_rep"].to_numpy(), dtype=np.int64)
    right = np.ascontiguousarray(candidates["right_rep"].to_numpy(), dtype=np.int64)
    _check_within(left, left_first, left_sets.size, "left")
    _check_within(right, right_first, right_sets.size, "right")
    jac = jaccard_between(left_sets.offsets, left_sets.elements, left - left_first,
                          right_sets.offsets, right_sets.elements, right - right_first, threshold)
    keep = jac >= threshold
    return pl.DataFrame(
        {
            "left_rep": left[keep],
            "right_rep": right[keep],
            "jaccard": jac[keep],
            "bands_shared": candidates["bands_shared"].to_numpy()[keep].astype(np.int32),
        }
    )


def _check_within(ids: np.ndarray, first: int, size: int, side: str) -> None:
    if len(ids) and (ids.min() < first or ids.max() >= first + size):
        raise AssertionError(f"{side} ids outside the sets given ({first}..{first + size - 1})")


def add_estimates(verified: pl.DataFrame, sets: Membership, params: SignatureParams) -> pl.DataFrame:
    """Add ``estimate``, the signature estimate of each verified pair, by signing again only
    the sets that appear in a verified pair (no n x k matrix is kept for this)."""
    return add_estimates_between(verified, sets, 0, sets, 0, params)


def add_estimates_between(verified: pl.DataFrame, left_sets: Membership, left_first: int,
                          right_sets: Membership, right_first: int, params: SignatureParams,
                          max_bytes: int | None = None) -> pl.DataFrame:
    """:func:`add_estimates` with the two sides' sets given apart, as in :func:`verify_between`.
    With ``max_bytes``, the pairs are taken a slice at a time whose signatures (two rows a
    pair, raw and comparable, 8 bytes a position) take at most that many bytes."""
    left_all = verified["left_rep"].to_numpy() - left_first
    right_all = verified["right_rep"].to_numpy() - right_first
    step = len(left_all) if max_bytes is None else max(1024, max_bytes // (4 * 8 * params.perms))
    estimates = []
    for lo, hi in slice_bounds(len(left_all), step):
        left, right = left_all[lo:hi], right_all[lo:hi]
        if left_sets is right_sets and left_first == right_first:
            left_matrix, left_row = _signed(left_sets, np.concatenate([left, right]), params)
            right_matrix, right_row = left_matrix, left_row
        else:
            left_matrix, left_row = _signed(left_sets, left, params)
            right_matrix, right_row = _signed(right_sets, right, params)
        estimates.append(signature_agreement(left_matrix, left_row, np.ascontiguousarray(left),
                                             right_matrix, right_row, np.ascontiguousarray(right)))
        del left_matrix, right_matrix, left_row, right_row
    est = np.concatenate(estimates) if estimates else np.empty(0, dtype=np.float64)
    return verified.with_columns(pl.Series("estimate", est)).select(
        "left_rep", "right_rep", "jaccard", "estimate", "bands_shared")


def _signed(sets: Membership, wanted: np.ndarray, params: SignatureParams) -> tuple[np.ndarray, np.ndarray]:
    """Signatures of the distinct ``wanted`` sets, and the row of each set id in them."""
    ids = np.unique(wanted)
    matrix = comparable(sign_membership(sets, ids, params), params)
    row_of = np.full(sets.size, -1, dtype=np.int64)
    row_of[ids] = np.arange(len(ids))
    return matrix, row_of
