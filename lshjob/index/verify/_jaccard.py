"""Compiled exact Jaccard of pairs of sets held as CSR (offsets, sorted element ids): the
verify stage's kernels, shared with the audit."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.hashing import FIBONACCI


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


def exact_jaccard(offsets, elements, left, right):
    """Exact Jaccard of each pair (no filtering), both sides in one CSR."""
    return exact_jaccard_between(offsets, elements, left, offsets, elements, right)


@numba.njit(parallel=True, cache=True)
def exact_jaccard_between(left_offsets, left_elements, left, right_offsets, right_elements, right):
    """Exact Jaccard of set ``left[p]`` of the first CSR and ``right[p]`` of the second (no
    filtering; the same division as :func:`jaccard_between`, so the same float)."""
    n = left.shape[0]
    out = np.empty(n, dtype=np.float64)
    for p in numba.prange(n):
        a0, a1 = left_offsets[left[p]], left_offsets[left[p] + 1]
        b0, b1 = right_offsets[right[p]], right_offsets[right[p] + 1]
        inter = _intersection(left_elements, a0, a1, right_elements, b0, b1, 0)
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
def element_masks(offsets, elements):
    """One 64-bit mask a set of a CSR: each element sets bit (code x 2^64/phi) >> 58 (Fibonacci
    hashing; any fixed map of elements to bits would do). Two sets' masks bound their
    intersection (:func:`_screened`)."""
    n = offsets.shape[0] - 1
    out = np.empty(n, dtype=np.uint64)
    for s in numba.prange(n):
        mask = np.uint64(0)
        for j in range(offsets[s], offsets[s + 1]):
            mask |= np.uint64(1) << ((np.uint64(elements[j]) * FIBONACCI) >> np.uint64(58))
        out[s] = mask
    return out


@numba.njit(inline="always")
def _bits(x):
    """Set bits of a uint64 (SWAR count, Hacker's Delight 5-1)."""
    x = x - ((x >> np.uint64(1)) & np.uint64(0x5555555555555555))
    x = (x & np.uint64(0x3333333333333333)) + ((x >> np.uint64(2)) & np.uint64(0x3333333333333333))
    x = (x + (x >> np.uint64(4))) & np.uint64(0x0F0F0F0F0F0F0F0F)
    return (x * np.uint64(0x0101010101010101)) >> np.uint64(56)


@numba.njit(inline="always")
def _screened(left_offsets, left_elements, left_masks, a, right_offsets, right_elements, right_masks, b, threshold):
    """The Jaccard of sets a and b when it reaches ``threshold``, else -1.0: :func:`jaccard_between`'s
    values, with the sets' :func:`element_masks` read first. A bit of A's mask that B's lacks
    comes from an element of A outside B, and distinct bits from distinct elements, so
    |A n B| <= |A| - popcount(mA & ~mB), and likewise from B's side. A pair whose bound is below
    the intersection the threshold needs is not merged: on long-tailed data most candidates
    fail there, reading 8 bytes a set instead of its elements."""
    a0, a1 = left_offsets[a], left_offsets[a + 1]
    b0, b1 = right_offsets[b], right_offsets[b + 1]
    la, lb = a1 - a0, b1 - b0
    if min(la, lb) < threshold * max(la, lb) - 1e-9:
        return -1.0
    need = int(np.ceil(threshold / (1.0 + threshold) * (la + lb) - 1e-9))
    ma, mb = left_masks[a], right_masks[b]
    if min(la - np.int64(_bits(ma & ~mb)), lb - np.int64(_bits(mb & ~ma))) < need:
        return -1.0
    inter = _intersection(left_elements, a0, a1, right_elements, b0, b1, need)
    jac = inter / (la + lb - inter)
    return jac if (inter >= need and jac >= threshold) else -1.0


SCREEN_BLOCK = 1 << 16  # candidates a task of :func:`screened_rows`


@numba.njit(parallel=True, cache=True)
def screened_rows(left_offsets, left_elements, left_masks, left, left_first, right_offsets, right_elements,
                  right_masks, right, right_first, bands, threshold):
    """The candidates (entity ids ``left[p]`` from ``left_first``, ``right[p]`` from
    ``right_first``, ``bands[p]``) whose Jaccard (:func:`_screened`'s) reaches
    ``threshold``, in the candidates' order: (left, right, jaccard, bands), made in two passes
    over blocks of candidates (the values and each block's count, then the rows kept), so no
    mask or gather of every candidate is made beside them; and how many left and right ids lie
    outside the sets given (their pairs are not kept; the caller refuses them)."""
    n = left.shape[0]
    blocks = (n + SCREEN_BLOCK - 1) // SCREEN_BLOCK
    values = np.empty(n, dtype=np.float64)
    kept = np.zeros(blocks + 1, dtype=np.int64)
    outside = np.zeros((blocks, 2), dtype=np.int64)
    na, nb = len(left_offsets) - 1, len(right_offsets) - 1
    for k in numba.prange(blocks):
        count = 0
        for p in range(k * SCREEN_BLOCK, min(n, (k + 1) * SCREEN_BLOCK)):
            a, b = left[p] - left_first, right[p] - right_first
            if a < 0 or a >= na or b < 0 or b >= nb:
                outside[k, 0] += a < 0 or a >= na
                outside[k, 1] += b < 0 or b >= nb
                values[p] = -1.0
                continue
            values[p] = _screened(left_offsets, left_elements, left_masks, a, right_offsets, right_elements,
                                  right_masks, b, threshold)
            count += values[p] >= threshold
        kept[k + 1] = count
    for k in range(blocks):
        kept[k + 1] += kept[k]
    out_left = np.empty(kept[blocks], dtype=np.int64)
    out_right = np.empty(kept[blocks], dtype=np.int64)
    out_jaccard = np.empty(kept[blocks], dtype=np.float64)
    out_bands = np.empty(kept[blocks], dtype=np.int32)
    for k in numba.prange(blocks):
        q = kept[k]
        for p in range(k * SCREEN_BLOCK, min(n, (k + 1) * SCREEN_BLOCK)):
            if values[p] >= threshold:
                out_left[q], out_right[q], out_jaccard[q], out_bands[q] = left[p], right[p], values[p], bands[p]
                q += 1
    return out_left, out_right, out_jaccard, out_bands, outside[:, 0].sum(), outside[:, 1].sum()


@numba.njit(parallel=True, cache=True)
def intersections_of(left, right, jaccard, left_offsets, left_first, right_offsets, right_first):
    """|A n B| of pairs given their exact Jaccard J = i / (|A| + |B| - i): i = J (|A| + |B|) / (1 + J),
    rounded (entity ids ``left[p]`` from ``left_first`` in the first CSR's offsets, and so on)."""
    out = np.empty(len(left), dtype=np.int64)
    for p in numba.prange(len(left)):
        a, b = left[p] - left_first, right[p] - right_first
        total = (left_offsets[a + 1] - left_offsets[a]) + (right_offsets[b + 1] - right_offsets[b])
        out[p] = int(np.rint(jaccard[p] * total / (1.0 + jaccard[p])))
    return out


@numba.njit(parallel=True, cache=True)
def jaccard_from(left, right, inter, left_offsets, left_first, right_offsets, right_first):
    """Jaccard of pairs from their intersections (as :func:`intersections_of` takes them): the
    same division as the kernels, so the same float."""
    out = np.empty(len(left), dtype=np.float64)
    for p in numba.prange(len(left)):
        a, b = left[p] - left_first, right[p] - right_first
        total = (left_offsets[a + 1] - left_offsets[a]) + (right_offsets[b + 1] - right_offsets[b])
        out[p] = inter[p] / (total - inter[p])
    return out


@numba.njit(parallel=True, cache=True)
def pair_keys(left, right, inter, bands, id_bits, inter_bits, band_bits):
    """One 64-bit key a row: (left, right, intersection, bands) packed high to low in
    ``id_bits``, ``id_bits``, ``inter_bits`` and ``band_bits`` bits (the caller checks they
    fit), so sorting the keys groups a pair's rows."""
    out = np.empty(len(left), dtype=np.uint64)
    low = inter_bits + band_bits
    for p in numba.prange(len(left)):
        out[p] = ((np.uint64(left[p]) << np.uint64(low + id_bits)) | (np.uint64(right[p]) << np.uint64(low))
                  | (np.uint64(inter[p]) << np.uint64(band_bits)) | np.uint64(bands[p]))
    return out


@numba.njit(cache=True)
def pairs_of_keys(key, id_bits, inter_bits, band_bits):
    """The runs of sorted :func:`pair_keys`: each pair's (left, right, intersection) and the sum
    of its rows' bands, in key order; one pass to count the pairs and one to fill them (no
    array of shifted keys or run starts)."""
    n = len(key)
    shift, id_mask = np.uint64(band_bits), np.uint64((1 << id_bits) - 1)
    inter_mask, band_mask = np.uint64((1 << inter_bits) - 1), np.uint64((1 << band_bits) - 1)
    pairs = 0
    for p in range(n):
        if p == 0 or (key[p] >> shift) != (key[p - 1] >> shift):
            pairs += 1
    left = np.empty(pairs, dtype=np.int64)
    right = np.empty(pairs, dtype=np.int64)
    inter = np.empty(pairs, dtype=np.int64)
    bands = np.zeros(pairs, dtype=np.int32)
    q = -1
    for p in range(n):
        pair = key[p] >> shift
        if p == 0 or pair != (key[p - 1] >> shift):
            q += 1
            inter[q] = np.int64(pair & inter_mask)
            pair >>= np.uint64(inter_bits)
            left[q] = np.int64(pair >> np.uint64(id_bits))
            right[q] = np.int64(pair & id_mask)
        bands[q] += np.int32(key[p] & band_mask)
    return left, right, inter, bands
