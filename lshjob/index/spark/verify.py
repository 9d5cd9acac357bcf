"""Spark verify engine: candidates -> exact Jaccard and estimate (:class:`lshjob.index.verify.base.VerifyEngine`).

The driver saves the sets of the run (a part at a time, from the :class:`SetStore`) as
Parquet beside the candidates: ``id``, the sorted element codes and, when there are
signatures, each element's XXH64 (what signing starts from, :mod:`lshjob.core.sets`).
Spark joins each candidate to its two sets (two shuffles); the executors compute exact
Jaccard with the verify kernel and, for the pairs kept, sign both sets again with the
signing kernels to give the estimate (:func:`lshjob.index.spark._batches.verify_pairs`),
then write VERIFIED as Parquet, which the driver reads back for publishing (the seam hands
VERIFIED over as a table).
"""

from __future__ import annotations

import shutil
from functools import partial
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from lshjob.core.atomic import temp_name
from lshjob.core.hashing import xxh64_integers
from lshjob.core.sets import gather_sets
from lshjob.index.spark import _batches
from lshjob.index.spark.session import SparkStage, quiet_pandas_warning, session
from lshjob.index.verify.base import VERIFIED_SCHEMA, SetStore, VerifySettings, empty_verified
from lshjob.sign.signatures import SignatureParams

VERIFIED_DDL = "left_rep long, right_rep long, jaccard double, estimate double, bands_shared int"


class SparkVerify(SparkStage):
    """The verify engine on Spark."""


    def verify(self, candidates: Path, sets: SetStore, threshold: float, params: SignatureParams | None,
               settings: VerifySettings, crowds: Path | None = None) -> pl.DataFrame:
        candidates = Path(candidates)
        has_rows = candidates.is_file() or (candidates.is_dir() and any(candidates.rglob("*.parquet")))
        if not has_rows and crowds is None:
            return empty_verified()
        quiet_pandas_warning()
        spark = session()
        wanted = np.union1d(candidate_ids(candidates) if has_rows else np.empty(0, np.int64),
                            crowd_ids(crowds) if crowds is not None else np.empty(0, np.int64))
        if len(wanted) == 0:
            return empty_verified()
        work = temp_name(candidates.parent / f"{candidates.name}-spark-verify")
        work.mkdir()
        try:
            save_sets(sets, params is not None, work / "sets", wanted)
            cands = all_candidates(spark, candidates if has_rows else None, crowds)
            held = spark.read.parquet(str((work / "sets").absolute()))
            columns = ["elements", "hashes"] if params is not None else ["elements"]
            left = held.select(held.id.alias("left_rep"), *(held[c].alias(f"left_{c}") for c in columns))
            right = held.select(held.id.alias("right_rep"), *(held[c].alias(f"right_{c}") for c in columns))
            joined = cands.join(left, "left_rep").join(right, "right_rep")
            verified = joined.mapInArrow(partial(_batches.verify_pairs, threshold, params), VERIFIED_DDL)
            verified.write.parquet(str((work / "verified").absolute()))
            files = sorted((work / "verified").glob("*.parquet"))
            if not files:
                return empty_verified()
            return pl.read_parquet(files).select(*VERIFIED_SCHEMA).cast(VERIFIED_SCHEMA)
        finally:
            shutil.rmtree(work, ignore_errors=True)


def candidate_ids(candidates: Path) -> np.ndarray:
    """The entity ids in a candidate, sorted, each once (8 bytes an id: less than the sets the
    driver holds), read from the candidates' files."""
    files = [str(candidates)] if candidates.is_file() else sorted(str(p) for p in candidates.rglob("*.parquet"))
    frame = pl.scan_parquet(files, hive_partitioning=False)
    ids = pl.concat([frame.select(id=pl.col("left_rep")), frame.select(id=pl.col("right_rep"))]).unique()
    return np.sort(ids.collect().get_column("id").to_numpy())


def save_sets(store: SetStore, with_hashes: bool, folder: Path, wanted: np.ndarray) -> None:
    """The sets of the ``wanted`` entity ids (sorted) as Parquet (``id``, ``elements`` and,
    ``with_hashes``, the elements' XXH64 as Int64 bits), one file a part; the sets of no
    candidate are not shipped to the executors."""
    folder.mkdir(parents=True)
    for i, (first, last) in enumerate(store.ranges):
        ids = wanted[np.searchsorted(wanted, first):np.searchsorted(wanted, last, side="right")]
        if len(ids) == 0:
            continue
        sets = store.load(i)
        offsets, elements = gather_sets(sets.offsets, sets.elements, np.ascontiguousarray(ids - first))
        offsets = pa.array(np.asarray(offsets, dtype=np.int64))
        columns = {"id": pa.array(ids.astype(np.int64)),
                   "elements": pa.LargeListArray.from_arrays(offsets, pa.array(elements))}
        if with_hashes:
            hashes = sets.text_hashes[elements] if sets.text_hashes is not None else xxh64_integers(elements)
            columns["hashes"] = pa.LargeListArray.from_arrays(offsets, pa.array(hashes.view(np.int64)))
        pq.write_table(pa.table(columns), folder / f"part-{i:05d}.parquet", compression="lz4")
        del sets


def crowd_ids(crowds: Path) -> np.ndarray:
    """The entity ids listed in a CROWDS file (:mod:`lshjob.index.join.base`), sorted, each once."""
    return np.unique(pl.read_parquet(crowds, columns=["rep"])["rep"].to_numpy())


def all_candidates(spark, candidates: Path | None, crowds: Path | None):
    """CANDIDATES as one row per pair, ``bands_shared`` summed over the pair's rows (a join may
    write a row per band a pair met in), with the pairs of every crowd (the members of a large
    bucket, each pair a row of one band) made by a self-join on the crowd: the rows the local
    engine verifies (:func:`lshjob.index.verify.local.verify_blocks`)."""
    from pyspark.sql import functions as F  # noqa: N812

    parts = []
    if candidates is not None:
        parts.append(spark.read.parquet(str(candidates.absolute())).select("left_rep", "right_rep", "bands_shared"))
    if crowds is not None:
        members = spark.read.parquet(str(Path(crowds).absolute())).select("crowd", "rep")
        a, b = members.alias("a"), members.alias("b")
        parts.append(a.join(b, (F.col("a.crowd") == F.col("b.crowd")) & (F.col("a.rep") < F.col("b.rep")))
                     .select(F.col("a.rep").alias("left_rep"), F.col("b.rep").alias("right_rep"),
                             F.lit(1).cast("int").alias("bands_shared")))
    rows = parts[0] if len(parts) == 1 else parts[0].unionByName(parts[1])
    return rows.groupBy("left_rep", "right_rep").agg(F.sum("bands_shared").cast("int").alias("bands_shared"))
