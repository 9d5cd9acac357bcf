"""The bucket tables of the refresh's index state (for :mod:`lshjob.jobs.refresh_index`).

A refresh needs, for each bucket its new sets fall in, the live sets already there: a few rows
among tens of millions (1M sets x 38 bands). Scanning a Parquet table of every bucket row for
them costs the same at any batch size, so a table is kept sorted and looked up by binary search
over the memory-mapped file, touching only the pages of the buckets asked for.

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


def _open(path: Path) -> tuple[np.memmap, int, int]:
    words = np.memmap(path, dtype=WORD, mode="r")
    return words, int(words[0]), int(words[1])


def _band(words: np.memmap, n: int, band: int) -> tuple[np.ndarray, np.ndarray]:
    start = HEADER + 2 * band * n
    return words[start:start + n], words[start + n:start + 2 * n]


def rows_in(paths: list[Path], queries: list[np.ndarray], live: np.ndarray) -> pl.DataFrame:
    """Rows (band, bucket, set) of the tables ``paths`` in the buckets ``queries[band]`` (sorted
    unique keys) whose set is live (``live[set]``; ids past its end are not)."""
    found = []
    for path in paths:
        words, bands, n = _open(path)
        if n == 0:
            continue
        for band in range(bands):
            keys, ids = _band(words, n, band)
            wanted = queries[band]
            lo = np.searchsorted(keys, wanted, side="left")
            hi = np.searchsorted(keys, wanted, side="right")
            counts = hi - lo
            total = int(counts.sum())
            if total == 0:
                continue
            starts = np.repeat(lo - (np.cumsum(counts) - counts), counts)
            at = starts + np.arange(total)
            sets = ids[at].astype(np.int64)
            keep = sets < len(live)
            keep[keep] = live[sets[keep]]
            found.append(pl.DataFrame({"band": np.full(int(keep.sum()), band, dtype=np.int32),
                                       "bucket": keys[at][keep], "set": sets[keep]}))
        del words
    if not found:
        return pl.DataFrame(schema={"band": pl.Int32, "bucket": pl.UInt64, "set": pl.Int64})
    return pl.concat(found)


def compact(store: Path, paths: list[Path], relative: str, bands: int, live: np.ndarray,
            run_id: str) -> StoredFile:
    """One table of the live sets of ``paths`` (the tables of several refreshes)."""
    opened = [_open(p) for p in paths]
    columns: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def band_rows(band: int) -> tuple[np.ndarray, np.ndarray]:
        keys, ids = [], []
        for words, _, n in opened:
            if n:
                k, s = _band(words, n, band)
                s = np.array(s).astype(np.int64)
                keep = (s < len(live))
                keep[keep] = live[s[keep]]
                keys.append(np.array(k)[keep])
                ids.append(s[keep])
        return np.concatenate(keys), np.concatenate(ids)

    # every table lists its sets in the same order in no band: order each band's rows by set id
    sets = np.sort(band_rows(0)[1])

    def keys_of(band: int) -> np.ndarray:
        if band not in columns:
            columns.clear()
            columns[band] = band_rows(band)
        keys, ids = columns[band]
        return keys[np.argsort(ids, kind="stable")]

    return write(store, relative, bands, run_id, keys_of, sets)
