"""Collapse entities with identical sets into one representative before banding.

Identical sets have identical signatures and land in the same bucket of every band: a
thousand patrons whose only loan is the same bestseller would make one bucket of a
thousand in each band and half a million pairs. They are grouped first and paired up
after verification instead.

Grouping: a 128-bit order-independent fingerprint of each set (two sums of mixed element
ids) proposes groups; every member is then compared element by element with its group's
representative, so a group never holds two different sets. Entities whose signatures
agree but whose sets differ stay apart; they meet in every band and are verified like any
other pair.

Output contract of :func:`collapse_identical`: ``rep_of[i]`` is the entity id of i's
representative (the smallest id of its group, ``rep_of[r] == r``); ``reps`` are the
representatives, ascending.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64
from lshjob.core.sets import Membership

_C1 = np.uint64(0x243F6A8885A308D3)
_C2 = np.uint64(0x13198A2E03707344)


@numba.njit(parallel=True, cache=True)
def _fingerprints(offsets, elements):
    n = offsets.shape[0] - 1
    a = np.zeros(n, dtype=np.uint64)
    b = np.zeros(n, dtype=np.uint64)
    for i in numba.prange(n):
        sa = np.uint64(0)
        sb = np.uint64(0)
        for j in range(offsets[i], offsets[i + 1]):
            x = np.uint64(elements[j])
            sa += fmix64(x ^ _C1)
            sb += fmix64(x ^ _C2)
        a[i] = sa
        b[i] = sb
    return a, b


@numba.njit(parallel=True, cache=True)
def _confirm(offsets, elements, rep_of):
    n = offsets.shape[0] - 1
    out = rep_of.copy()
    for i in numba.prange(n):
        r = rep_of[i]
        if r == i:
            continue
        la = offsets[i + 1] - offsets[i]
        if la != offsets[r + 1] - offsets[r]:
            out[i] = i
            continue
        for t in range(la):
            if elements[offsets[i] + t] != elements[offsets[r] + t]:
                out[i] = i
                break
    return out


def fingerprints(sets: Membership) -> tuple[np.ndarray, np.ndarray]:
    """The two 64-bit halves of each set's order-independent fingerprint (module docstring)."""
    return _fingerprints(sets.offsets, sets.elements)


def collapse_identical(sets: Membership, prints: tuple[np.ndarray, np.ndarray] | None = None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """(rep_of, reps): see the module contract. ``prints``: the sets' fingerprints, when the
    caller already has them."""
    fa, fb = fingerprints(sets) if prints is None else prints
    frame = pl.DataFrame({"id": np.arange(sets.size, dtype=np.int64), "fa": fa, "fb": fb})
    rep = frame.select(pl.col("id").min().over("fa", "fb"))["id"].to_numpy()
    rep_of = _confirm(sets.offsets, sets.elements, np.ascontiguousarray(rep))
    reps = np.flatnonzero(rep_of == np.arange(sets.size))
    return rep_of, reps
