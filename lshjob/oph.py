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
"""

from __future__ import annotations

import numba
import numpy as np

from .hashing import fmix64

EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)


@numba.njit(inline="always")
def fast_range(h, k):
    return ((h >> np.uint64(32)) * np.uint64(k)) >> np.uint64(32)


@numba.njit(parallel=True, cache=True)
def sign_oph(h0, offsets, k, salts):
    n = offsets.shape[0] - 1
    out = np.full((n, k), EMPTY, dtype=np.uint64)
    for g in numba.prange(n):
        row = out[g]
        for j in range(offsets[g], offsets[g + 1]):
            x = h0[j]
            b = fast_range(fmix64(x ^ salts[0]), k)
            v = fmix64(x ^ salts[1])
            if v < row[b]:
                row[b] = v
    return out


@numba.njit(parallel=True, cache=True)
def densify(signatures, salt):
    n, k = signatures.shape
    out = signatures.copy()
    for g in numba.prange(n):
        row = signatures[g]
        filled = 0
        for i in range(k):
            if row[i] != EMPTY:
                filled += 1
        if filled == k or filled == 0:
            continue
        for i in range(k):
            if row[i] != EMPTY:
                continue
            a = np.uint64(1)
            while True:
                j = fast_range(fmix64(salt ^ ((np.uint64(i) << np.uint64(32)) | a)), k)
                if row[j] != EMPTY:
                    out[g, i] = row[j]
                    break
                a += np.uint64(1)
    return out


def set_size_estimate(signatures: np.ndarray) -> np.ndarray:
    """Distinct count from OPH bins: linear counting -k ln(empty/k) while bins are empty
    (Whang, Vander-Zanden, Taylor, "A linear-time probabilistic counting algorithm for
    database applications", TODS 1990); with no empty bin, each bin's minimum is that of
    about n/k uniforms, and (k-1)/sum(u) estimates n/k for each (Cohen 1997; from memory)."""
    k = signatures.shape[1]
    empty = (signatures == EMPTY).sum(axis=1)
    u = (signatures.astype(np.float64) + 1.0) / 2.0**64
    u[signatures == EMPTY] = 0.0
    with np.errstate(divide="ignore"):
        linear = -k * np.log(np.maximum(empty, 1) / k)
        full = k * (k - 1) / np.maximum(u.sum(axis=1), 1e-300)
    return np.maximum(1.0, np.where(empty > 0, linear, full))
