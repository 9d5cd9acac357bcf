"""Spark band engine: bucket keys -> rows of shared buckets (:class:`lshjob.index.band.base.BandEngine`).

``keys``: the key table of a slice of representatives whose signatures the driver holds
(the seam hands them over in memory), by the definition's own code
(:func:`lshjob.index.band.local.bucket_keys_by_position`): shipping them to the executors
and back would only add a round trip.

``shared_rows``: the key slices are saved as Parquet (when given as tables; keys as the
Int64 of their bits, which Spark reads natively); Spark reads them and turns each row into
one bucket row per band, counts each (band, bucket) in a shuffle and keeps the buckets of
two or more; each task writes its rows as one BUCKET_ROWS file (``mapInArrow``: bucket
UInt64, as the contract says; Spark itself has no unsigned type). The driver gets back the
file names and row counts only.
"""

from __future__ import annotations

from functools import partial
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.index.band.base import BandOutput
from lshjob.index.band.local import bucket_keys_by_position
from lshjob.index.spark import _batches
from lshjob.index.spark.session import SparkStage, quiet_pandas_warning, session

BUCKET_ROW_DDL = "band int, bucket long, rep long"
KEY_GROUP_ROWS = 1 << 16  # representatives of a row group of the saved keys (Spark splits reads by row groups)


class SparkBand(SparkStage):
    """The band engine on Spark."""


    def keys(self, positions: np.ndarray, reps: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
        return bucket_keys_by_position(positions, reps, bands, rows)

    def shared_rows(self, key_slices, bands: int, out_dir: Path, batch_bytes: int, progress=None) -> BandOutput:
        out_dir = Path(out_dir)
        out_dir.mkdir(parents=True, exist_ok=True)
        slices = list(key_slices)
        files = []
        for n, piece in enumerate(slices):
            if isinstance(piece, pl.DataFrame):  # the executors read files: save the tables beside the output
                (out_dir / "keys").mkdir(exist_ok=True)
                piece = out_dir / "keys" / f"keys-{n:06d}.parquet"
                signed = slices[n].with_columns(pl.col(str(j)).reinterpret(signed=True) for j in range(bands))
                signed.write_parquet(piece, compression="uncompressed", statistics=False, row_group_size=KEY_GROUP_ROWS)
            files.append(str(Path(piece).absolute()))
        total = sum(_rows(f) for f in files) * bands
        written = shared_bucket_rows(files, bands, out_dir) if files else []
        if progress is not None:
            progress.advance(bands)
        return BandOutput([Path(p) for p, _ in written], sum(r for _, r in written), total)


def shared_bucket_rows(key_files: list[str], bands: int, out_dir: Path) -> list[tuple[str, int]]:
    """Write the rows of buckets holding two or more representatives as BUCKET_ROWS files in
    ``out_dir``, one a Spark task; return each file and its rows, in file name order."""
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    quiet_pandas_warning()
    spark = session()
    keys = spark.read.parquet(*key_files)
    rows = keys.select(F.col("rep").cast("long"), F.posexplode(F.array(*(_as_long(keys, j) for j in range(bands))))
                       .alias("band", "bucket"))
    shared = (rows.withColumn("size", F.count("*").over(Window.partitionBy("band", "bucket")))
              .where(F.col("size") >= 2).select("band", "bucket", "rep"))
    made = shared.mapInArrow(partial(_batches.write_bucket_file, str(out_dir.absolute())), "path string, rows long")
    return sorted((r["path"], int(r["rows"])) for r in made.collect())


def _as_long(keys, band: int):
    """A key column as the Int64 of its 64 bits: as saved here (Int64 already), or as
    :func:`lshjob.index.band.base.save_keys` saved it (UInt64, which Spark reads as a decimal)."""
    from pyspark.sql import functions as F
    from pyspark.sql.types import DecimalType

    name = f"`{band}`"
    if isinstance(keys.schema[str(band)].dataType, DecimalType):
        return F.expr(f"CAST(CASE WHEN {name} >= 9223372036854775808 THEN {name} - 18446744073709551616 "
                      f"ELSE {name} END AS BIGINT)")
    return F.col(name)


def _rows(path: str) -> int:
    import pyarrow.parquet as pq

    return pq.ParquetFile(path).metadata.num_rows
