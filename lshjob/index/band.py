"""Band stage (polars): representatives' signatures -> bucket rows, one per band.

Bucket key of band j for a signature v (rows r): h = j; then for t in 0..r-1,
h = h * M + v[j*r + t] (mod 2**64, M = 0x9E3779B97F4A7C15, odd); key = fmix64(h) (MurmurHash3
finaliser, :mod:`lshjob.core.hashing`): stable across processes, machines and library versions.
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
from lshjob.core.hashing import GOLDEN, fmix64_expr

ROW_BYTES = 28


BAND_MULTIPLIER = GOLDEN  # odd, so h -> h * M is invertible mod 2**64 (a band's values mix without collapsing)


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
    (:func:`lshjob.sign.signatures.comparable_by_position`: row i holds position i)."""
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
    (never concatenated whole: one band's keys at a time), each a table or a Parquet file
    written by :func:`save_keys` (then only one band's keys are ever in memory).

    Returns the files written and the number of rows written."""
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
    return files, total


def save_keys(keys: pl.DataFrame, path: Path) -> Path:
    """Write a slice of the wide key table for :func:`write_shared_bucket_rows` to read back a
    band at a time (a run in parts keeps no key table in memory)."""
    # Uncompressed: random 64-bit keys do not compress, and lz4 doubled the write time
    # (3M rows x 25 bands: 0.83 s against 0.37 s; reading a band back 8 ms either way).
    keys.write_parquet(path, compression="uncompressed", statistics=False)
    return path


def _column(keys: pl.DataFrame | list[Path], name: str) -> np.ndarray:
    if isinstance(keys, pl.DataFrame):
        return keys.get_column(name).to_numpy()
    return pl.scan_parquet(keys).select(name).collect().get_column(name).to_numpy()


PART_ROWS = 1 << 15  # keys per partition: its two bitmaps (about 8 KiB) and keys stay in cache


@numba.njit(nogil=True, cache=True)
def _shared(keys, log2_slots):
    """Positions of the keys that occur twice or more, ordered by key, then position.

    The keys are first split by their top bits into partitions of about ``PART_ROWS``
    (a stable counting sort of (key, position)), so each partition's work stays in cache:
    a bitmap at 10 million keys is 64 MB, and probing it at random cost four times as much
    (measured). In a partition, a first pass marks the keys whose top bits, down to
    ``log2_slots`` bits of the whole key, are also those of another key (two bitmaps: bits
    seen once, bits seen again; keys are fmix64 outputs, so their top bits are uniform).
    The marks are a superset of the repeated keys, a few percent of all at about 32 bits a
    key; only they are sorted to find the exact repeats."""
    n = keys.shape[0]
    part_bits = 0
    while (n >> part_bits) > PART_ROWS and part_bits < log2_slots - 12:
        part_bits += 1
    parts = 1 << part_bits
    part_shift = np.uint64(64 - part_bits) if part_bits > 0 else np.uint64(63)
    # stable counting sort by partition
    starts = np.zeros(parts + 1, dtype=np.int64)
    for key in keys:
        p = np.int64(key >> part_shift) if part_bits > 0 else 0
        starts[p + 1] += 1
    for p in range(parts):
        starts[p + 1] += starts[p]
    fill = starts[:-1].copy()
    part_keys = np.empty(n, dtype=np.uint64)
    part_pos = np.empty(n, dtype=np.int64)
    for i in range(n):
        p = np.int64(keys[i] >> part_shift) if part_bits > 0 else 0
        part_keys[fill[p]] = keys[i]
        part_pos[fill[p]] = i
        fill[p] += 1
    bits = log2_slots - part_bits  # slots per partition
    shift = np.uint64(64 - log2_slots)
    mask = np.uint64((1 << bits) - 1)
    seen = np.empty(max(1, (1 << bits) >> 6), dtype=np.uint64)
    again = np.empty(max(1, (1 << bits) >> 6), dtype=np.uint64)
    out = np.empty(n, dtype=np.int64)
    kept = 0
    largest = 0
    for p in range(parts):
        largest = max(largest, starts[p + 1] - starts[p])
    marked = np.empty(largest, dtype=np.int64)
    for p in range(parts):
        a, b = starts[p], starts[p + 1]
        seen[:] = 0
        again[:] = 0
        for i in range(a, b):
            s = (part_keys[i] >> shift) & mask
            word, bit = s >> np.uint64(6), np.uint64(1) << (s & np.uint64(63))
            if seen[word] & bit:
                again[word] |= bit
            else:
                seen[word] |= bit
        m = 0
        for i in range(a, b):
            s = (part_keys[i] >> shift) & mask
            if again[s >> np.uint64(6)] & (np.uint64(1) << (s & np.uint64(63))):
                marked[m] = i
                m += 1
        order = marked[:m][np.argsort(part_keys[marked[:m]], kind="mergesort")]  # stable: ties by position
        i = 0
        while i < m:
            j = i + 1
            while j < m and part_keys[order[j]] == part_keys[order[i]]:
                j += 1
            if j - i >= 2:
                for t in range(i, j):
                    out[kept] = part_pos[order[t]]
                    kept += 1
            i = j
    return out[:kept]


def bands_per_batch(n_rows: int, bands: int, batch_bytes: int) -> int:
    return int(max(1, min(bands, batch_bytes // max(1, n_rows * ROW_BYTES))))
