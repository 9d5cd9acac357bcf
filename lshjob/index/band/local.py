"""Local band engine (polars and compiled kernels): representatives' signatures -> bucket rows.

Keys and tables as defined in :mod:`lshjob.index.band.base`.

The run first builds the wide key table (``rep`` and one key column per band;
8 bytes per band and representative) a slice of representatives at a time, so the full
signature matrix is never held; then writes each band's shared buckets. Buckets of one,
most of them, are never written: the join would only discard them. The keys are made by a
compiled kernel, a band's block of representatives per task (the rule in
:mod:`lshjob.index.band.base`; :func:`lshjob.index.conformance.reference_keys` states it in
Python integers): about a third of the time of the same rule as polars expressions (746k
representatives x 46 bands of 4 rows: 0.33 against 0.8-1.25 s).

Input layout: signatures by position (a (positions x n) matrix, one contiguous row a
position), so a band's r rows are read as r streams.

Finding shared buckets (compiled, one band per thread): a pass over the band's keys marks
the rows whose key's top bits collide in a bitmap of about 32 bits per row (no false
negatives; a few percent false positives); only those are sorted to keep the exact matches.
Sorting every key of every band in polars cost about four times as much at 1M rows, and
sorting the marked rows in polars twice as much (measured).

Memory, beside the key table: each band being searched (one per thread) holds a copy of its
key column, the keys and positions split by partition and the positions kept: 32 bytes a
representative (0.6 GB for two threads at 10 million). A batch of B bands keeps its shared
rows until written; the batch size keeps n x B x 28 bytes under ``batch_bytes``.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64
from lshjob.index.band._shared import _shared
from lshjob.index.band.base import BAND_MULTIPLIER, BandOutput

ROW_BYTES = 28


class LocalBand:
    """The band engine of this process (:class:`lshjob.index.band.base.BandEngine`)."""

    name = "local"

    def keys(self, positions: np.ndarray, reps: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
        return bucket_keys_by_position(positions, reps, bands, rows)

    def shared_rows(self, key_slices, bands: int, out_dir: Path, batch_bytes: int, progress=None) -> BandOutput:
        return write_shared_bucket_rows(list(key_slices), bands, out_dir, batch_bytes=batch_bytes, progress=progress)


def bucket_keys_by_position(columns: np.ndarray, rep_ids: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """The wide key table of a slice of representatives (``rep`` and one UInt64 column per
    band, named by the band number) from their signatures laid out by position
    (:func:`lshjob.sign.signatures.comparable_by_position`: row i holds position i)."""
    if bands * rows > len(columns):
        raise ValueError(f"{bands} bands of {rows} rows need {bands * rows} signature positions; "
                         f"the signatures hold {len(columns)}")
    keys = np.empty((bands, len(rep_ids)), dtype=np.uint64)
    _band_keys(columns, rows, np.uint64(BAND_MULTIPLIER), keys)
    return pl.DataFrame({"rep": rep_ids.astype(np.int64), **{str(j): keys[j] for j in range(bands)}})


KEY_BLOCK = 1 << 14  # representatives a task: a band's r position rows of them stay in cache


@numba.njit(parallel=True, cache=True)
def _band_keys(columns, rows, multiplier, keys):
    """keys[j, i] = fmix64(Horner's rule over positions j*rows..j*rows+rows-1 of set i, from
    h = j), wrapping mod 2**64: :mod:`lshjob.index.band.base`'s bucket key of band j."""
    bands, n = keys.shape
    blocks = (n + KEY_BLOCK - 1) // KEY_BLOCK
    for task in numba.prange(bands * blocks):
        j, lo = task // blocks, (task % blocks) * KEY_BLOCK
        for i in range(lo, min(n, lo + KEY_BLOCK)):
            h = np.uint64(j)
            for t in range(rows):
                h = h * multiplier + columns[j * rows + t, i]
            keys[j, i] = fmix64(h)


def write_shared_bucket_rows(
    keys: pl.DataFrame | list[pl.DataFrame | Path], bands: int, out_dir: Path, batch_bytes: int = 1 << 30,
    progress=None
) -> BandOutput:
    """Write the rows of buckets holding two or more representatives (one Parquet file per
    batch of bands); buckets of one can form no pair and are only counted. ``keys`` is the
    wide key table of all representatives, or its slices in order
    (never concatenated whole: one band's keys at a time), each a table or a Parquet file
    written by :func:`lshjob.index.band.base.save_keys` (then only one band's keys are ever in memory).

    Returns the files written, the number of rows written and of all bucket rows."""
    out_dir.mkdir(parents=True, exist_ok=True)
    slices = [keys] if isinstance(keys, pl.DataFrame) else list(keys)
    if slices and all(isinstance(s, Path) for s in slices):
        slices = [slices]  # saved keys: one read of all files a column (polars reads them in parallel)
    reps = np.concatenate([_column(s, "rep") for s in slices]) if slices else np.empty(0, np.int64)
    height = len(reps)
    step = bands_per_batch(height, bands, batch_bytes)
    log2_slots = max(16, int(np.ceil(np.log2(max(2, height)))) + 5)  # about 32 bits a row

    def shared_rows(j: int) -> pl.DataFrame:
        column = np.concatenate([_column(s, str(j)) for s in slices])
        rows = _shared(column, log2_slots)
        return pl.DataFrame({
            "band": np.full(len(rows), j, dtype=np.int32), "bucket": column[rows], "rep": reps[rows],
        })

    files, total = [], 0
    with ThreadPoolExecutor(max_workers=numba.get_num_threads()) as pool:  # kernels release the GIL
        for first in range(0, bands, step):
            batch = range(first, min(bands, first + step))
            shared = pl.concat(list(pool.map(shared_rows, batch)))
            path = out_dir / f"buckets-{first:05d}.parquet"
            shared.write_parquet(path, compression="lz4", statistics=False)
            files.append(path)
            total += shared.height
            if progress is not None:
                progress.advance(len(batch))
    return BandOutput(files, total, height * bands)


def _column(keys: pl.DataFrame | list[Path], name: str) -> np.ndarray:
    if isinstance(keys, pl.DataFrame):
        return keys.get_column(name).to_numpy()
    return pl.scan_parquet(keys).select(name).collect().get_column(name).to_numpy()


def bands_per_batch(n_rows: int, bands: int, batch_bytes: int) -> int:
    return int(max(1, min(bands, batch_bytes // max(1, n_rows * ROW_BYTES))))
