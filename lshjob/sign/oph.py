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

from lshjob.core import slicing
from lshjob.core.compile_cache import readonly
from lshjob.core.slicing import slice_bounds
from lshjob.sign._fold import EMPTY
from lshjob.sign._oph import _densify


def densify(signatures, salt, by_position):
    """Densified copy of (n x k) stored signatures; (k x n) when ``by_position``. The
    signatures go in read-only, so one compiled kernel serves arrays read from files and
    arrays just made."""
    return _densify(readonly(signatures), salt, by_position)


def set_size_estimate(signatures: np.ndarray) -> np.ndarray:
    """Distinct count from OPH bins: linear counting -k ln(empty/k) while bins are empty
    (Whang, Vander-Zanden, Taylor, "A linear-time probabilistic counting algorithm for
    database applications", TODS 1990); with no empty bin, each bin's minimum is that of
    about n/k uniforms, and (k-1)/sum(u) estimates n/k for each (Cohen 1997; from memory)."""
    k = signatures.shape[1]
    n = signatures.shape[0]
    empty = np.empty(n, dtype=np.int64)
    sums = np.empty(n, dtype=np.float64)
    for a, b in slice_bounds(n, slicing.SLICE_ROWS):  # blocks: no full-size float copies
        block = signatures[a:b]
        u = (block.astype(np.float64) + 1.0) / 2.0**64
        u[block == EMPTY] = 0.0
        empty[a:b] = (block == EMPTY).sum(axis=1)
        sums[a:b] = u.sum(axis=1)
    with np.errstate(divide="ignore"):
        linear = -k * np.log(np.maximum(empty, 1) / k)
        full = k * (k - 1) / np.maximum(sums, 1e-300)
    return np.maximum(1.0, np.where(empty > 0, linear, full))
