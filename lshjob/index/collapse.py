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

A run in parts collapses each part alone; :func:`identical_candidates` pairs the
representatives of different parts whose fingerprints agree, for verification to confirm:
with bands too, as identical sets would meet through them only while their buckets stay
under --max-bucket (tiny sets of a popular element on long-tailed data are the ones whose
buckets do not).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64
from lshjob.core.sets import ElementSets

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


def fingerprints(sets: ElementSets) -> tuple[np.ndarray, np.ndarray]:
    """The two 64-bit halves of each set's order-independent fingerprint (module docstring)."""
    return _fingerprints(sets.offsets, sets.elements)


def collapse_identical(sets: ElementSets, prints: tuple[np.ndarray, np.ndarray] | None = None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """(rep_of, reps): see the module contract. ``prints``: the sets' fingerprints, when the
    caller already has them."""
    fa, fb = fingerprints(sets) if prints is None else prints
    frame = pl.DataFrame({"id": np.arange(sets.size, dtype=np.int64), "fa": fa, "fb": fb})
    rep = frame.select(pl.col("id").min().over("fa", "fb"))["id"].to_numpy()
    rep_of = _confirm(sets.offsets, sets.elements, np.ascontiguousarray(rep))
    reps = np.flatnonzero(rep_of == np.arange(sets.size))
    return rep_of, reps


def identical_candidates(prints: pl.DataFrame, ranges: list[tuple[int, int]], out: Path,
                         bands_shared: int = 0, name: str = "pairs.parquet") -> int:
    """Pairs of representatives (of different parts) with the same set fingerprint, written
    into ``out`` split by parts as the join writes candidates (a file ``name`` a block, beside
    any the join wrote there); their number. Verification keeps those whose sets are
    identical (Jaccard 1). ``prints``: ``rep``, ``fa``, ``fb`` (:func:`fingerprints`).
    ``bands_shared``: 0 for a run without bands, else 1, a row like the join's (the pair's
    every band is given back after verification, :func:`every_band_when_identical`).
    A group holds at most one representative a part (identical sets within a part were
    collapsed), so every pair of a group is listed."""
    grouped = prints.with_columns(size=pl.len().over("fa", "fb")).filter(pl.col("size") > 1)
    pairs = (grouped.join(grouped, on=["fa", "fb"], suffix="_other")
             .filter(pl.col("rep") < pl.col("rep_other"))
             .select(pl.col("rep").alias("left_rep"), pl.col("rep_other").alias("right_rep"),
                     pl.lit(bands_shared, dtype=pl.Int32).alias("bands_shared")))
    firsts = np.array([a for a, _ in ranges], dtype=np.int64)
    pairs = pairs.with_columns(
        left_part=pl.Series(np.searchsorted(firsts, pairs["left_rep"].to_numpy(), side="right") - 1),
        right_part=pl.Series(np.searchsorted(firsts, pairs["right_rep"].to_numpy(), side="right") - 1),
    )
    out.mkdir(parents=True, exist_ok=True)
    for (i, j), block in pairs.group_by("left_part", "right_part"):
        folder = out / f"left_part={i}" / f"right_part={j}"
        folder.mkdir(parents=True, exist_ok=True)
        block.select("left_rep", "right_rep", "bands_shared").write_parquet(folder / name)
    return pairs.height


def move_pair_blocks(source: Path, target: Path) -> None:
    """Move the block files of :func:`identical_candidates` from ``source`` into the folder of
    the join's candidates ``target`` (each to the same block: ``left_part=i/right_part=j``)."""
    for file in sorted(source.rglob("*.parquet")):
        place = target / file.relative_to(source)
        place.parent.mkdir(parents=True, exist_ok=True)
        file.replace(place)


def every_band_when_identical(verified: pl.DataFrame, bands: int) -> pl.DataFrame:
    """VERIFIED with ``bands_shared`` = ``bands`` for the pairs of Jaccard 1: identical sets have
    identical signatures, so they share every band's bucket, even one over --max-bucket that
    the join left out (the value the groups of identical sets publish)."""
    return verified.with_columns(pl.when(pl.col("jaccard") == 1.0).then(pl.lit(bands, dtype=pl.Int32))
                                 .otherwise(pl.col("bands_shared")).alias("bands_shared"))
