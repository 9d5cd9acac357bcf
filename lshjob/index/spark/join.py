"""Spark join engine: bucket rows -> candidate pairs (:class:`lshjob.index.join.base.JoinEngine`).

The same steps as the DuckDB engine's SQL (``index/sql/``), as Spark shuffles: each bucket's
size (``sized_bucket_rows.sql``), buckets over the cap keyed further by each member's bucket
in the next band (``split_oversize.sql``), the skew report (``bucket_skew.sql``, one row
collected), and the pairs of each usable bucket or sub-bucket counted per pair
(``candidates.sql``). The executors read the bucket files (UInt64 keys as Int64 bits,
:mod:`lshjob.index.spark._batches`) and write the candidates; the driver gets back the skew
row and reads the files' footers for the count.

Without ranges the contract asks for one file: the pairs are gathered into one task to
write it. With ranges, Spark writes the folder ``left_part=i/right_part=j/`` itself.
"""

from __future__ import annotations

import os
import shutil
from contextlib import contextmanager
from pathlib import Path

from lshjob.core.atomic import staged_folder, temp_name
from lshjob.index.join.base import SKEW_COLUMNS, JoinOutput, JoinSettings
from lshjob.index.spark import _batches
from lshjob.index.spark.band import BUCKET_ROW_DDL
from lshjob.index.spark.session import SparkStage, file_frame, quiet_pandas_warning, session


class SparkJoin(SparkStage):
    """The join engine on Spark."""


    def candidates(self, bucket_files, bands: int, out: Path, settings: JoinSettings,
                   bucket_rows: int | None = None, ranges=None) -> JoinOutput:
        quiet_pandas_warning()
        spark = session()
        out = Path(out)
        files = [str(Path(f).absolute()) for f in bucket_files]
        if files:
            paths = file_frame(spark, files)
            rows = paths.mapInArrow(_batches.bucket_rows_of_files, BUCKET_ROW_DDL)
        else:
            rows = spark.createDataFrame([], BUCKET_ROW_DDL)
        total = bucket_rows if bucket_rows is not None else _file_rows(files)
        with candidate_pairs(rows, bands, settings.max_bucket, total) as (pairs, skew):
            count = _write_one_file(pairs, out) if ranges is None else _write_blocks(pairs, out, list(ranges))
        return JoinOutput(out, count, skew)


@contextmanager
def candidate_pairs(rows, bands: int, cap: int, bucket_rows: int):
    """(pairs, skew) of bucket rows (``band``, ``bucket`` as Int64 bits, ``rep``; one row a
    band and representative, ``bucket_rows`` of them): the pairs a DataFrame of CANDIDATES,
    one row a pair, to use inside the ``with`` (its inputs are held until it ends); the skew
    report collected (module docstring)."""
    from pyspark import StorageLevel
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    sized = (rows.withColumn("size", F.count("*").over(Window.partitionBy("band", "bucket")))
             .where(F.col("size") >= 2).persist(StorageLevel.MEMORY_AND_DISK))
    try:
        oversize = sized.where(F.col("size") > cap).select("band", "bucket", "rep")
        nxt = sized.select(F.col("rep").alias("next_rep"), F.col("band").alias("next_band"),
                           F.col("bucket").alias("sub"))
        split = (oversize.join(nxt, (nxt.next_rep == oversize.rep) & (nxt.next_band == (oversize.band + 1) % bands))
                 .select("band", "bucket", "sub", "rep")
                 .withColumn("size", F.count("*").over(Window.partitionBy("band", "bucket", "sub")))
                 .persist(StorageLevel.MEMORY_AND_DISK))
        try:
            skew = _skew(sized, split, cap, bucket_rows)
            skew["max_bucket"] = cap
            zero = F.lit(0).cast("long").alias("sub")
            whole = sized.where(F.col("size") <= cap).select("band", "bucket", zero, "rep")
            parted = split.where(F.col("size").between(2, cap)).select("band", "bucket", "sub", "rep")
            usable = whole.unionByName(parted)
            a, b = usable.alias("a"), usable.alias("b")
            pairs = (a.join(b, (F.col("a.band") == F.col("b.band")) & (F.col("a.bucket") == F.col("b.bucket"))
                            & (F.col("a.sub") == F.col("b.sub")) & (F.col("a.rep") < F.col("b.rep")))
                     .groupBy(F.col("a.rep").alias("left_rep"), F.col("b.rep").alias("right_rep"))
                     .agg(F.count("*").cast("int").alias("bands_shared")))
            yield pairs, skew
        finally:
            split.unpersist()
    finally:
        sized.unpersist()


def _skew(sized, split, cap: int, bucket_rows: int) -> dict:
    """The skew report (``sql/bucket_skew.sql``): one row, collected."""
    from pyspark.sql import functions as F

    pairs = F.expr("size * (size - 1) div 2")  # a bucket's pairs (64-bit: buckets of up to 4 billion)
    within = F.col("size").between(2, cap)
    over = F.col("size") > cap
    sizes = sized.groupBy("band", "bucket").agg(F.first("size").alias("size"))
    buckets = sizes.agg(
        F.count("*").alias("shared"),
        F.coalesce(F.sum("size"), F.lit(0)).alias("shared_rows"),
        F.count(F.when(over, 1)).alias("oversize_buckets"),
        F.coalesce(F.sum(F.when(over, F.col("size"))), F.lit(0)).alias("oversize_rows"),
        F.coalesce(F.sum(F.when(over, pairs)), F.lit(0)).alias("oversize_pairs"),
        F.coalesce(F.sum(F.when(within, pairs)), F.lit(0)).alias("bucket_pairs"),
        F.coalesce(F.max("size"), F.lit(0)).alias("largest_bucket"),
    )
    sub_buckets = split.groupBy("band", "bucket", "sub").agg(F.first("size").alias("size")).agg(
        F.coalesce(F.sum(F.when(within, pairs)), F.lit(0)).alias("split_pairs"),
        F.count(F.when(over, 1)).alias("oversize_sub_buckets"),
    )
    row = subs = buckets.crossJoin(sub_buckets).collect()[0]  # two one-row tables, one job
    report = {
        "buckets": bucket_rows - int(row["shared_rows"]) + int(row["shared"]),
        "buckets_with_pairs": int(row["shared"]),
        "oversize_buckets": int(row["oversize_buckets"]),
        "oversize_rows": int(row["oversize_rows"]),
        "oversize_pairs": int(row["oversize_pairs"]),
        "split_pairs": int(subs["split_pairs"]),
        "skipped_pairs": int(row["oversize_pairs"]) - int(subs["split_pairs"]),
        "oversize_sub_buckets": int(subs["oversize_sub_buckets"]),
        "bucket_pairs": int(row["bucket_pairs"]),
        "largest_bucket": int(row["largest_bucket"]),
    }
    assert tuple(report) == SKEW_COLUMNS
    return report


def _write_one_file(pairs, out: Path) -> int:
    """The pairs as the one Parquet file ``out`` (one task writes it), renamed into place."""
    tmp = temp_name(out)
    try:
        pairs.repartition(1).write.mode("overwrite").parquet(str(tmp.absolute()))
        parts = sorted(tmp.glob("part-*.parquet"))
        if len(parts) != 1:
            raise AssertionError(f"Spark wrote {len(parts)} files of candidates, not one")
        os.replace(parts[0], out)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return _file_rows([str(out)])


def _write_blocks(pairs, out: Path, ranges: list[tuple[int, int]]) -> int:
    """The pairs split by the parts of their two sides, ``left_part=i/right_part=j/*.parquet``."""
    from pyspark.sql import functions as F

    def part_of(column: str):
        expr = None
        for i, (_, last) in enumerate(ranges):
            expr = F.when(F.col(column) <= last, i) if expr is None else expr.when(F.col(column) <= last, i)
        return expr.otherwise(len(ranges) - 1).cast("int")

    with staged_folder(out, fsync=False) as tmp:
        (pairs.withColumn("left_part", part_of("left_rep")).withColumn("right_part", part_of("right_rep"))
         .write.mode("overwrite").partitionBy("left_part", "right_part").parquet(str(tmp.absolute())))
        for marker in tmp.glob("*SUCCESS*"):
            marker.unlink()
    return _file_rows([str(p) for p in out.rglob("*.parquet")])


def _file_rows(files: list[str]) -> int:
    import pyarrow.parquet as pq

    return sum(pq.ParquetFile(f).metadata.num_rows for f in files)
