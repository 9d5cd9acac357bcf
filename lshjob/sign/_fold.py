"""THE per-element fold of each scheme: the only place a signature value is computed.

Every signing kernel (:mod:`lshjob.sign._kperm` over CSR sets, :mod:`lshjob.sign._oph`,
:mod:`lshjob.sign._grouped` over grouped events) keeps its own loop over sets and elements,
because those differ for a reason, and folds each element hash ``h`` (XXH64 of the element's
canonical text, :func:`lshjob.core.sets.element_hash`) into the set's row with the functions
below. The definitions (DEVELOPERS.md, "The hash family", items 3 and 4):

* ``kperm`` (Broder 1997): ``row[i] = min(row[i], fmix64(h XOR salt[i]))`` for every i;
* ``oph`` (Li, Owen and Zhang 2012): bin ``b = fast_range(fmix64(h XOR salt[0]), k)``,
  ``row[b] = min(row[b], fmix64(h XOR salt[1]))``.

A row starts at ``EMPTY`` for both. The folds are inlined into the kernels' loop nests
(``inline="always"``), so the kperm loop over positions stays one vectorised loop (its
machine code is the same as when each kernel had its own copy). Numba's cache checks a kernel
against its own module only: after editing this one, clear the cache (DEVELOPERS.md).
"""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64

EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)  # an empty oph bin; every row's start (no fmix64 output exceeds it)
CHUNK = 256  # sets per parallel task, in every signing kernel: one row buffer (or table of seen codes) each


@numba.njit(inline="always")
def fast_range(h, k):
    """``h`` reduced to 0..k-1 by its high 32 bits (Lemire's multiply-shift range reduction)."""
    return ((h >> np.uint64(32)) * np.uint64(k)) >> np.uint64(32)


@numba.njit(inline="always")
def fold_kperm(h, salts, k, row):
    """Scheme ``kperm``: position i < k keeps the minimum of fmix64(h XOR salt[i]). ``k`` (the
    row's length) comes from the kernel, as each kernel's own copy had it: 2 to 5% less CPU
    than reading it from the row (bench/RESULTS.md, "One fold per scheme")."""
    for i in range(k):
        v = fmix64(h ^ salts[i])
        if v < row[i]:  # noqa: PLR1730  (the branch form the kernels were measured with)
            row[i] = v


@numba.njit(inline="always")
def fold_oph(h, salts, k, row):
    """Scheme ``oph``: the element's one bin of k keeps the minimum of fmix64(h XOR salt[1])."""
    b = fast_range(fmix64(h ^ salts[0]), k)
    v = fmix64(h ^ salts[1])
    if v < row[b]:  # noqa: PLR1730
        row[b] = v


@numba.njit(inline="always")
def fold_element(h, salts, k, oph_scheme, row):
    """The fold of the scheme chosen at run time (kernels that serve both)."""
    if oph_scheme:
        fold_oph(h, salts, k, row)
    else:
        fold_kperm(h, salts, k, row)
