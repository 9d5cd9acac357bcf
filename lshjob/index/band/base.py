"""The band stage's seam: what every band engine takes and gives (tables and Parquet files).

Bucket key of band j for a signature v (rows r): h = j; then for t in 0..r-1,
h = h * M + v[j*r + t] (mod 2**64, M = :data:`BAND_MULTIPLIER`, odd); key = fmix64(h)
(MurmurHash3 finaliser, :mod:`lshjob.core.hashing`): stable across processes, machines and
library versions. Two signatures that agree on all r rows of a band share its bucket. Rows
that differ in one position never collide (M is odd, so invertible mod 2**64, and fmix64 is
a bijection); otherwise the signature values are pseudo-random 64-bit words and a collision
has probability about 2**-64 per pair; verification rejects such pairs anyway.

Tables across the seam:

* KEY_TABLE (a slice of representatives): ``rep`` Int64 and one UInt64 column per band,
  named by the band number (``"0"``, ``"1"``, ...), holding the bucket key; given to
  :meth:`BandEngine.shared_rows` as tables in memory, or as Parquet files written by
  :func:`save_keys` (a run in parts keeps no key table in memory).
* BUCKET_ROWS (Parquet files): ``band`` Int32, ``bucket`` UInt64, ``rep`` Int64; one row per
  (band, representative) whose bucket holds at least one other representative. Buckets of
  one, most of them, are never written: the join would only discard them.

:mod:`lshjob.index.conformance` checks an engine against these definitions.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar, Protocol, runtime_checkable

import numpy as np
import polars as pl

from lshjob.contracts.tables import BUCKET_ROWS
from lshjob.core.hashing import GOLDEN

BAND_MULTIPLIER = GOLDEN  # odd, so h -> h * M is invertible mod 2**64 (a band's values mix without collapsing)

BUCKET_ROWS_SCHEMA = dict(BUCKET_ROWS.schema)  # declared once, in lshjob.contracts.tables


@dataclass(frozen=True)
class BandOutput:
    files: list[Path]  # BUCKET_ROWS files (shared buckets only)
    rows_written: int  # rows in those files
    rows_total: int  # every bucket row: representatives x bands (for the skew report)


@runtime_checkable
class BandEngine(Protocol):
    name: ClassVar[str]

    def keys(self, positions: np.ndarray, reps: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
        """KEY_TABLE of representatives ``reps`` (entity ids) from their signatures laid out by
        position (a (positions x n) UInt64 matrix: row i holds position i of every signature,
        :func:`lshjob.sign.signatures.comparable_by_position`)."""
        ...

    def shared_rows(self, key_slices: Sequence[pl.DataFrame | Path], bands: int, out_dir: Path,
                    batch_bytes: int, progress=None) -> BandOutput:
        """KEY_TABLE slices in entity order (all tables or all files) -> BUCKET_ROWS files in
        ``out_dir`` of the buckets holding two or more representatives. ``batch_bytes``: what
        the engine may hold of the rows being written; ``progress.advance(bands)`` as bands
        are done, when given."""
        ...


def save_keys(keys: pl.DataFrame, path: Path) -> Path:
    """Write a KEY_TABLE slice for :meth:`BandEngine.shared_rows` to read back (a band at a
    time, for the local engine)."""
    # Uncompressed: random 64-bit keys do not compress, and lz4 doubled the write time
    # (3M rows x 25 bands: 0.83 s against 0.37 s; reading a band back 8 ms either way).
    keys.write_parquet(path, compression="uncompressed", statistics=False)
    return path
