"""Band stage (polars): representatives' signatures -> bucket rows, one per band.

Bucket key of band j for a signature v (rows r): h = j; then for t in 0..r-1,
h = fmix64(h XOR v[j*r + t]) (MurmurHash3 finaliser, :mod:`lshjob.hashing`): stable across
processes, machines and library versions. Two signatures that agree on all r rows of a
band share its bucket; different rows collide with probability about 2**-64 per pair, and
verification rejects such pairs anyway.

Output contract (Parquet files, one per batch of bands): ``band`` Int32, ``bucket`` UInt64,
``rep`` Int64; one row per (band, representative).

Memory: a batch of B bands holds n x B bucket keys (8 bytes each) plus polars' unpivoted
copy (about 20 bytes a row), on top of the n x k signature matrix the caller holds; the
batch size is chosen so that n x B x 28 bytes stays under ``batch_bytes``. The run calls
this on slices of representatives, so the full signature matrix is never held.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl

from .hashing import fmix64_expr

ROW_BYTES = 28


def bucket_columns(frame: pl.DataFrame, bands: range, rows: int) -> pl.DataFrame:
    """Add one UInt64 column per band (named by the band number) holding its bucket key.

    ``frame`` has an Array(UInt64) column ``sig``. The key is built step by step with
    intermediate columns so that every expression stays small.
    """
    names = [str(j) for j in bands]
    frame = frame.with_columns([pl.lit(j, dtype=pl.UInt64).alias(str(j)) for j in bands])
    for t in range(rows):
        frame = frame.with_columns(
            [pl.col(str(j)).xor(pl.col("sig").arr.get(j * rows + t)).alias(str(j)) for j in bands]
        ).with_columns([fmix64_expr(pl.col(name)).alias(name) for name in names])
    return frame.select("rep", *names)


def bands_per_batch(n_rows: int, bands: int, batch_bytes: int) -> int:
    return int(max(1, min(bands, batch_bytes // max(1, n_rows * ROW_BYTES))))


def write_bucket_rows(
    signatures: np.ndarray,
    rep_ids: np.ndarray,
    bands: int,
    rows: int,
    out_dir: Path,
    batch_bytes: int = 1 << 30,
    progress=None,
    prefix: str = "",
) -> tuple[list[Path], int]:
    """Hash each band of each representative's signature; write Parquet batches to out_dir.

    Returns the files written and the number of bucket rows.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    n, k = signatures.shape
    frame = pl.DataFrame(
        {
            "rep": rep_ids.astype(np.int64),
            "sig": pl.Series(signatures[:, : bands * rows], dtype=pl.Array(pl.UInt64, bands * rows)),
        }
    )
    step = bands_per_batch(n, bands, batch_bytes)
    files, total = [], 0
    for first in range(0, bands, step):
        batch = range(first, min(bands, first + step))
        wide = bucket_columns(frame, batch, rows)
        long = wide.unpivot(index="rep", variable_name="band", value_name="bucket").select(
            pl.col("band").cast(pl.Int32), "bucket", "rep"
        )
        path = out_dir / f"buckets-{prefix}{first:05d}.parquet"
        long.write_parquet(path, compression="lz4", statistics=False)
        files.append(path)
        total += long.height
        if progress is not None:
            progress.advance(len(batch))
    return files, total
