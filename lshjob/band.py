"""Band stage (polars): representatives' signatures -> bucket rows, one per band.

Bucket key of band j for a signature v (rows r): h = j; then for t in 0..r-1,
h = h * M + v[j*r + t] (mod 2**64, M = 0x9E3779B97F4A7C15, odd); key = fmix64(h) (MurmurHash3
finaliser, :mod:`lshjob.hashing`): stable across processes, machines and library versions.
Two signatures that agree on all r rows of a band share its bucket. Rows that differ in one
position never collide (M is odd, so invertible mod 2**64, and fmix64 is a bijection);
otherwise the signature values are pseudo-random 64-bit words and a collision has
probability about 2**-64 per pair; verification rejects such pairs anyway. Horner's rule with
one finaliser at the end costs about half the column operations of a finaliser per row.

Output contract (Parquet files, one per batch of bands): ``band`` Int32, ``bucket`` UInt64,
``rep`` Int64; one row per (band, representative) whose bucket holds at least one other
representative. The run first builds the wide key table (``rep`` and one key column per band;
8 bytes per band and representative) a slice of representatives at a time, so the full
signature matrix is never held; then writes each band's shared buckets. Buckets of one,
most of them, are never written: the join would only discard them.

Input layout: polars reads signatures by position (``v0``, ``v1``, ... one contiguous column
each, from a (positions x n) matrix without a copy); reading positions out of an Array column
costs about three times as much (measured at 1M x 96).

Finding shared buckets: a compiled pass over each band's keys marks the rows whose key's top
bits collide in a bitmap of about 32 bits per row (no false negatives; a few percent false
positives); polars then sorts only those rows and keeps the exact matches. Sorting every key
of every band cost four times as much at 1M rows (measured).

Memory: a batch of B bands holds n x B bucket keys (8 bytes each) plus the marked rows
(about 20 bytes each); the batch size keeps n x B x 28 bytes under ``batch_bytes``.
"""

from __future__ import annotations

from pathlib import Path

import numba
import numpy as np
import polars as pl

from .hashing import fmix64_expr

ROW_BYTES = 28


BAND_MULTIPLIER = 0x9E3779B97F4A7C15


def bucket_columns(frame: pl.DataFrame, bands: range, rows: int) -> pl.DataFrame:
    """``rep`` and one UInt64 column per band (named by the band number) holding its bucket
    key. ``frame`` has the signature positions as UInt64 columns ``v0``, ``v1``, ..."""
    m = pl.lit(BAND_MULTIPLIER, dtype=pl.UInt64)
    exprs = []
    for j in bands:
        h = pl.lit(j, dtype=pl.UInt64)
        for t in range(rows):
            h = h * m + pl.col(f"v{j * rows + t}")
        exprs.append(fmix64_expr(h).alias(str(j)))
    return frame.lazy().select("rep", *exprs).collect()


def bucket_keys_by_position(columns: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """The wide key table of a slice of representatives (``rep`` and one UInt64 column per
    band, named by the band number) from their signatures laid out by position
    (:func:`lshjob.signatures.comparable_by_position`: row i holds position i)."""
    frame = pl.DataFrame(
        {"rep": rep_ids.astype(np.int64), **{f"v{i}": columns[i] for i in range(bands * rows)}}
    )
    return bucket_columns(frame, range(bands), rows)


def bucket_keys(signatures: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """The wide key table from signatures laid out by row (n x k)."""
    columns = np.ascontiguousarray(signatures[:, : bands * rows].T)
    return bucket_keys_by_position(columns, rep_ids, bands, rows)


def bucket_rows(signatures: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """Every bucket row (``band``, ``bucket``, ``rep``) of the given signatures."""
    return _long(bucket_keys(signatures, rep_ids, bands, rows), range(bands))


def _long(keys: pl.DataFrame, bands: range) -> pl.DataFrame:
    return keys.select("rep", *[str(j) for j in bands]).unpivot(
        index="rep", variable_name="band", value_name="bucket"
    ).select(pl.col("band").cast(pl.Int32), "bucket", "rep")


def write_shared_bucket_rows(
    keys: pl.DataFrame | list[pl.DataFrame], bands: int, out_dir: Path, batch_bytes: int = 1 << 30, progress=None
) -> tuple[list[Path], int]:
    """Write the rows of buckets holding two or more representatives (one Parquet file per
    batch of bands); buckets of one can form no pair and are only counted. ``keys`` is the
    wide key table of all representatives (:func:`bucket_keys`), or its slices in order
    (never concatenated: no copy of the whole table).

    Returns the files written and the number of rows written."""
    out_dir.mkdir(parents=True, exist_ok=True)
    slices = [s.rechunk() for s in ([keys] if isinstance(keys, pl.DataFrame) else keys)]  # no-op for one chunk
    height = sum(s.height for s in slices)
    step = bands_per_batch(height, bands, batch_bytes)
    log2_slots = max(16, int(np.ceil(np.log2(max(2, height)))) + 5)  # about 32 bits a row
    files, total = [], 0
    for first in range(0, bands, step):
        batch = range(first, min(bands, first + step))
        bucket = pl.col("bucket")
        parts = []
        for j in batch:
            columns = [s.get_column(str(j)).to_numpy() for s in slices]
            seen, again = _bitmaps(log2_slots)
            for c in columns:
                _count_twice(c, seen, again)
            marked = pl.concat([s.lazy().filter(pl.Series(_marked(c, again))) for s, c in zip(slices, columns)])
            parts.append(
                marked.select(pl.lit(j, dtype=pl.Int32).alias("band"), pl.col(str(j)).alias("bucket"), "rep")
                .sort("bucket", "rep")
                .filter((bucket == bucket.shift(1)) | (bucket == bucket.shift(-1)))
            )
        shared = pl.concat(parts).collect()  # one lazy concat runs the bands in parallel
        path = out_dir / f"buckets-{first:05d}.parquet"
        shared.write_parquet(path, compression="lz4", statistics=False)
        files.append(path)
        total += shared.height
        if progress is not None:
            progress.advance(len(batch))
    return files, total


# Marks: the keys whose top log2_slots bits are also those of another key, a superset of the
# keys that occur twice or more (keys are fmix64 outputs, so their top bits are uniform).
# Two bitmaps: bits seen once, bits seen again.

def _bitmaps(log2_slots: int) -> tuple[np.ndarray, np.ndarray]:
    words = 1 << (log2_slots - 6)
    return np.zeros(words, dtype=np.uint64), np.zeros(words, dtype=np.uint64)


@numba.njit(inline="always")
def _slot(key, log2_words):
    s = key >> np.uint64(58 - log2_words)
    return s >> np.uint64(6), np.uint64(1) << (s & np.uint64(63))


@numba.njit(cache=True)
def _count_twice(keys, seen, again):
    log2_words = np.int64(np.log2(seen.shape[0]))
    for key in keys:
        word, bit = _slot(key, log2_words)
        if seen[word] & bit:
            again[word] |= bit
        else:
            seen[word] |= bit


@numba.njit(cache=True)
def _marked(keys, again):
    log2_words = np.int64(np.log2(again.shape[0]))
    out = np.zeros(keys.shape[0], dtype=np.bool_)
    for i in range(keys.shape[0]):
        word, bit = _slot(keys[i], log2_words)
        out[i] = (again[word] & bit) != 0
    return out


def _colliding(keys: np.ndarray, log2_slots: int) -> np.ndarray:
    """The marks of one array of keys (see above)."""
    seen, again = _bitmaps(log2_slots)
    _count_twice(keys, seen, again)
    return _marked(keys, again)


def bands_per_batch(n_rows: int, bands: int, batch_bytes: int) -> int:
    return int(max(1, min(bands, batch_bytes // max(1, n_rows * ROW_BYTES))))
