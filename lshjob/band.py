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

Memory: a batch of B bands holds n x B bucket keys (8 bytes each) plus polars' unpivoted
copy (about 20 bytes a row), on top of the n x k signature matrix the caller holds; the
batch size is chosen so that n x B x 28 bytes stays under ``batch_bytes``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl

from .hashing import fmix64_expr

ROW_BYTES = 28


BAND_MULTIPLIER = 0x9E3779B97F4A7C15


def bucket_columns(frame: pl.DataFrame, bands: range, rows: int) -> pl.DataFrame:
    """``rep`` and one UInt64 column per band (named by the band number) holding its bucket
    key. ``frame`` has an Array(UInt64) column ``sig``."""
    m = pl.lit(BAND_MULTIPLIER, dtype=pl.UInt64)
    exprs = []
    for j in bands:
        h = pl.lit(j, dtype=pl.UInt64)
        for t in range(rows):
            h = h * m + pl.col("sig").arr.get(j * rows + t)
        exprs.append(h.alias(str(j)))
    names = [str(j) for j in bands]
    return frame.lazy().select("rep", *exprs).with_columns(
        [fmix64_expr(pl.col(name)).alias(name) for name in names]
    ).collect()


def bucket_keys(signatures: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """The wide key table of a slice of representatives: ``rep`` and one UInt64 column per
    band (named by the band number) holding its bucket key."""
    frame = pl.DataFrame(
        {
            "rep": rep_ids.astype(np.int64),
            # the whole (contiguous) matrix: a column slice would be copied first
            "sig": pl.Series(np.ascontiguousarray(signatures), dtype=pl.Array(pl.UInt64, signatures.shape[1])),
        }
    )
    return bucket_columns(frame, range(bands), rows)


def bucket_rows(signatures: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """Every bucket row (``band``, ``bucket``, ``rep``) of the given signatures."""
    return _long(bucket_keys(signatures, rep_ids, bands, rows), range(bands))


def _long(keys: pl.DataFrame, bands: range) -> pl.DataFrame:
    return keys.select("rep", *[str(j) for j in bands]).unpivot(
        index="rep", variable_name="band", value_name="bucket"
    ).select(pl.col("band").cast(pl.Int32), "bucket", "rep")


def write_shared_bucket_rows(
    keys: pl.DataFrame, bands: int, out_dir: Path, batch_bytes: int = 1 << 30, progress=None
) -> tuple[list[Path], int]:
    """Write the rows of buckets holding two or more representatives (one Parquet file per
    batch of bands); buckets of one can form no pair and are only counted. ``keys`` is the
    wide key table of all representatives (:func:`bucket_keys`, slices concatenated).

    Returns the files written and the number of rows written."""
    out_dir.mkdir(parents=True, exist_ok=True)
    step = bands_per_batch(keys.height, bands, batch_bytes)
    files, total = [], 0
    for first in range(0, bands, step):
        batch = range(first, min(bands, first + step))
        # sorted by key, a row is shared when a neighbour has its key (measured 2-3x faster
        # than is_duplicated at 1M-10M rows); one lazy concat runs the bands in parallel
        bucket = pl.col("bucket")
        shared = pl.concat([
            keys.lazy().select(pl.lit(j, dtype=pl.Int32).alias("band"), pl.col(str(j)).alias("bucket"), "rep")
            .sort("bucket")
            .filter((bucket == bucket.shift(1)) | (bucket == bucket.shift(-1)))
            for j in batch
        ]).collect()
        path = out_dir / f"buckets-{first:05d}.parquet"
        shared.write_parquet(path, compression="lz4", statistics=False)
        files.append(path)
        total += shared.height
        if progress is not None:
            progress.advance(len(batch))
    return files, total


def bands_per_batch(n_rows: int, bands: int, batch_bytes: int) -> int:
    return int(max(1, min(bands, batch_bytes // max(1, n_rows * ROW_BYTES))))
