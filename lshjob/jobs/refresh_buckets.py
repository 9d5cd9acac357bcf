"""The bucket tables of the refresh's index state (for :mod:`lshjob.jobs.refresh_index`).

A refresh needs, for each bucket its new sets fall in, the live sets already there: a few rows
among tens of millions (1M sets x 38 bands). Scanning a Parquet table of every bucket row for
them costs the same at any batch size, so a table is kept sorted and looked up by binary search
in it, a band mapped at a time.

A table is one file of little-endian unsigned 64-bit words: ``bands`` and ``n`` (the sets it
holds), then for each band in turn the ``n`` bucket keys in ascending order (ties by set id)
and the ``n`` set ids in the same order. Every set of a table has one bucket in every band.
Tables are written once (temporary name, fsync, rename), their SHA-256 computed as written.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.store.catalog import StoredFile

SUFFIX = "buckets.u64"
HEADER = 2  # words: bands, sets
WORD = np.dtype("<u8")


def write(store: Path, relative: str, bands: int, run_id: str, keys_of, sets: np.ndarray) -> StoredFile:
    """Write a table of ``sets`` (set ids) whose band ``b`` keys are ``keys_of(b)`` (an array
    aligned with ``sets``); return its catalog row."""
    path = Path(store) / relative
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    digest = hashlib.sha256()
    sets = np.asarray(sets, dtype=np.int64)
    by_set = np.argsort(sets, kind="stable")
    ids = sets[by_set].astype(WORD)
    with open(temporary, "wb") as fh:
        def put(array: np.ndarray) -> None:
            data = np.ascontiguousarray(array, dtype=WORD).tobytes()
            digest.update(data)
            fh.write(data)

        put(np.array([bands, len(sets)], dtype=WORD))
        for band in range(bands):
            keys = np.asarray(keys_of(band), dtype=WORD)[by_set]
            order = np.argsort(keys, kind="stable")  # ties stay in set order
            put(keys[order])
            put(ids[order])
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(temporary, path)
    return StoredFile(relative, "buckets", digest.hexdigest(), path.stat().st_size, run_id)


def write_wide(store: Path, relative: str, wide: pl.DataFrame, bands: int, run_id: str) -> StoredFile:
    """A table from the band engine's wide keys (``rep``: set ids; a UInt64 column per band)."""
    return write(store, relative, bands, run_id, lambda b: wide[str(b)].to_numpy(), wide["rep"].to_numpy())


def _header(path: Path) -> tuple[int, int]:
    with open(path, "rb") as fh:
        bands, n = (int(v) for v in np.fromfile(fh, dtype=WORD, count=HEADER))
    return bands, n


def _band(path: Path, n: int, band: int) -> tuple[np.memmap, np.memmap]:
    """A band's keys and set ids, mapped (only the pages touched are read; unmapped when dropped)."""
    start = WORD.itemsize * (HEADER + 2 * band * n)
    return (np.memmap(path, dtype=WORD, mode="r", offset=start, shape=(n,)),
            np.memmap(path, dtype=WORD, mode="r", offset=start + WORD.itemsize * n, shape=(n,)))


def rows_in(paths: list[Path], queries: list[np.ndarray], live: np.ndarray) -> pl.DataFrame:
    """Rows (band, bucket, set) of the tables ``paths`` in the buckets ``queries[band]`` (sorted
    unique keys) whose set is live (``live[set]``; ids past its end are not). A band is mapped
    at a time, so that what is resident is one band's pages, not the file."""
    found = []
    for path in paths:
        bands, n = _header(path)
        if n == 0:
            continue
        for band in range(bands):
            keys, ids = _band(path, n, band)
            wanted = queries[band]
            lo = np.searchsorted(keys, wanted, side="left")
            hi = np.searchsorted(keys, wanted, side="right")
            counts = hi - lo
            total = int(counts.sum())
            if total:
                at = np.repeat(lo - (np.cumsum(counts) - counts), counts) + np.arange(total)
                sets = np.asarray(ids[at], dtype=np.int64)
                keep = sets < len(live)
                keep[keep] = live[sets[keep]]
                found.append(pl.DataFrame({"band": np.full(int(keep.sum()), band, dtype=np.int32),
                                           "bucket": np.asarray(keys[at])[keep], "set": sets[keep]}))
            del keys, ids
    if not found:
        return pl.DataFrame(schema={"band": pl.Int32, "bucket": pl.UInt64, "set": pl.Int64})
    return pl.concat(found)


def compact(store: Path, paths: list[Path], relative: str, bands: int, live: np.ndarray,
            run_id: str) -> StoredFile:
    """One table of the live sets of ``paths`` (the tables of several refreshes), built a band
    at a time."""
    def band_rows(band: int) -> tuple[np.ndarray, np.ndarray]:
        keys, ids = [], []
        for path in paths:
            n = _header(path)[1]
            if n == 0:
                continue
            mapped = _band(path, n, band)
            k, s = np.array(mapped[0]), np.array(mapped[1]).astype(np.int64)
            del mapped
            keep = s < len(live)
            keep[keep] = live[s[keep]]
            keys.append(k[keep])
            ids.append(s[keep])
        return np.concatenate(keys), np.concatenate(ids)

    sets = np.sort(band_rows(0)[1])  # every band holds the same sets

    def keys_of(band: int) -> np.ndarray:
        keys, ids = band_rows(band)
        return keys[np.argsort(ids, kind="stable")]

    return write(store, relative, bands, run_id, keys_of, sets)


def all_pairs(path: Path, cap: int) -> tuple[pl.DataFrame, int]:
    """Every pair of sets sharing a bucket in a table (``left`` < ``right``) with the bands they
    share, and the largest bucket: a bucket is a run of equal keys in its band, its set ids in
    ascending order, so a run of s sets gives its s(s-1)/2 pairs in place (a build from
    nothing, where every set is new). A bucket over ``cap`` sets stops the search (no pair is
    returned; the caller gives the work to the full run)."""
    bands, n = _header(path)
    lefts, rights, largest = [], [], 0
    for band in range(bands if n else 0):
        keys, ids = _band(path, n, band)
        starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
        sizes = np.diff(np.r_[starts, n])
        largest = max(largest, int(sizes.max()))
        if largest > cap:
            return pl.DataFrame(schema={"left": pl.Int64, "right": pl.Int64, "bands_shared": pl.Int32}), largest
        for size in np.unique(sizes[sizes > 1]):
            first = starts[sizes == size]
            i, j = np.triu_indices(int(size), k=1)
            lefts.append(np.asarray(ids[(first[:, None] + i).ravel()], dtype=np.int64))
            rights.append(np.asarray(ids[(first[:, None] + j).ravel()], dtype=np.int64))
        del keys, ids
    if not lefts:
        return pl.DataFrame(schema={"left": pl.Int64, "right": pl.Int64, "bands_shared": pl.Int32}), largest
    rows = pl.DataFrame({"left": np.concatenate(lefts), "right": np.concatenate(rights)})
    del lefts, rights
    return rows.group_by("left", "right").agg(pl.len().cast(pl.Int32).alias("bands_shared")), largest
