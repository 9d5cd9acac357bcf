"""A run on Spark from the sets to the ranked neighbours: entity ids, identical sets,
bucket rows, verification and top-k, as Spark plans over DataFrames.

Each step keeps the local engine's definitions (:mod:`lshjob.contracts.tables`), so the rows
come out the same:

* entity ids (:func:`numbered`): the entities sorted by key, each numbered by
  ``monotonically_increasing_id`` after the sort (a range-partitioned sort: the numbers rise
  with the keys, gaps between partitions). Only their order is used (``left_rep <
  right_rep``, ties broken by neighbour ascending), and it is the local ids' order;
* identical sets (:func:`collapsed`): grouped by the set itself (the sorted hash list), the
  representative the smallest id of its group (:mod:`lshjob.index.collapse`);
* bucket rows (:func:`bucket_rows`): the representatives' bucket keys on the executors
  (:func:`lshjob.index.spark._events.band_rows`), then the join's steps
  (:func:`lshjob.index.spark.join.candidate_pairs`);
* verification (:func:`verified_pairs`): each candidate joined to both sets, exact Jaccard
  and the estimate by the local kernels (:func:`lshjob.index.spark._batches.verify_pairs`);
* top-k (:func:`ranked`): :func:`lshjob.index.publish.expand` and
  :func:`lshjob.index.publish.neighbour_blocks` as window functions: each representative's
  list holds the first top_k + 1 members of each group it pairs with and of its own group
  (Jaccard 1, estimate 1, every band shared), ranked by Jaccard descending then neighbour
  ascending and cut at top_k + 1; each member takes its representative's list less itself,
  cut at top_k.
"""

from __future__ import annotations

from functools import partial

from lshjob.index.spark import _batches, _events

VERIFIED_DDL = "left_rep long, right_rep long, jaccard double, estimate double, bands_shared int"
BUCKET_ROW_DDL = "band int, bucket long, rep long"


def held(frame):
    """``frame`` kept by the executors (memory, then disk) once computed: used more than once."""
    from pyspark import StorageLevel

    return frame.persist(StorageLevel.MEMORY_AND_DISK)


def numbered(sets):
    """``sets`` (``entity``, ``hashes``) with ``id``: rising with the key (module docstring)."""
    from pyspark.sql import functions as F  # noqa: N812

    return sets.orderBy("entity").withColumn("id", F.monotonically_increasing_id())


def collapsed(numbered_sets):
    """Each entity's ``id``, ``entity``, ``hashes`` and ``rep`` (its group's smallest id):
    the sets grouped by their sorted hash lists (a hash aggregate), each group's ids listed."""
    from pyspark.sql import functions as F  # noqa: N812

    groups = numbered_sets.groupBy("hashes").agg(F.min("id").alias("rep"), F.collect_list("id").alias("ids"))
    return numbered_sets.join(groups.select(F.explode("ids").alias("id"), "rep"), "id")


def representatives(members):
    """The representatives' ``id`` and ``hashes``."""
    from pyspark.sql import functions as F  # noqa: N812

    return members.where(F.col("id") == F.col("rep")).select("id", "hashes")


def bucket_rows(reps, params, bands: int, rows: int):
    """One bucket row (``band``, ``bucket`` as Int64 bits, ``rep``) a band and representative."""
    return reps.mapInArrow(partial(_events.band_rows, params, bands, rows), BUCKET_ROW_DDL)


def verified_pairs(candidates, reps, threshold: float, params):
    """VERIFIED rows of ``candidates`` (``left_rep``, ``right_rep``, ``bands_shared``; one row
    a pair): both sides' sets joined in two shuffles, the values from the local kernels."""
    from pyspark.sql import functions as F  # noqa: N812

    sides = []
    for side in ("left", "right"):
        columns = [F.col("id").alias(f"{side}_rep"), F.col("hashes").alias(f"{side}_elements")]
        if params is not None:  # the elements are their hashes: the same lists, signed again
            columns.append(F.col("hashes").alias(f"{side}_hashes"))
        sides.append(reps.select(*columns))
    joined = candidates.join(sides[0], "left_rep").join(sides[1], "right_rep")
    return joined.mapInArrow(partial(_batches.verify_pairs, threshold, params), VERIFIED_DDL)


def ranked(members, verified, top_k: int, bands: int):
    """Each entity's neighbours (``id``, ``neighbour`` ids, ``jaccard``, ``estimate``,
    ``bands_shared``, ``rank``), at most ``top_k`` (module docstring)."""
    from pyspark.sql import Window
    from pyspark.sql import functions as F  # noqa: N812

    cap = top_k + 1
    ids = members.select("id", "rep")
    head = (ids.withColumn("place", F.row_number().over(Window.partitionBy("rep").orderBy("id")))
            .where(F.col("place") <= cap).select("rep", F.col("id").alias("neighbour")))
    values = ["jaccard", "estimate", "bands_shared"]
    edges = verified.select(F.col("left_rep").alias("src"), F.col("right_rep").alias("dst"), *values).unionByName(
        verified.select(F.col("right_rep").alias("src"), F.col("left_rep").alias("dst"), *values))
    inter = edges.join(head.withColumnRenamed("rep", "dst"), "dst").select("src", "neighbour", *values)
    # a group's own members, the representative among them: a member drops itself below, and
    # a representative alone in its group drops itself from a list one longer than kept
    intra = head.select(F.col("rep").alias("src"), "neighbour", F.lit(1.0).alias("jaccard"),
                        F.lit(1.0).alias("estimate"), F.lit(bands).cast("int").alias("bands_shared"))
    order = [F.col("jaccard").desc(), F.col("neighbour").asc()]
    lists = (intra.unionByName(inter)
             .withColumn("place", F.row_number().over(Window.partitionBy("src").orderBy(*order)))
             .where(F.col("place") <= cap).drop("place"))
    return (ids.join(lists, ids.rep == lists.src).where(F.col("id") != F.col("neighbour"))
            .withColumn("rank", F.row_number().over(Window.partitionBy("id").orderBy(*order)))
            .where(F.col("rank") <= top_k).select("id", "neighbour", *values, "rank"))


def with_keys(rows, members):
    """``rows`` (:func:`ranked`) with the entities' keys, sorted by entity then rank, in
    NEIGHBOURS's columns (``rank`` Int32 here: Spark has no unsigned type)."""
    from pyspark.sql import functions as F  # noqa: N812

    keys = members.select("id", "entity")
    other = members.select(F.col("id").alias("neighbour"), F.col("entity").alias("neighbour_key"))
    return (rows.join(keys, "id").join(other, "neighbour").orderBy("id", "rank")
            .select("entity", F.col("neighbour_key").alias("neighbour"), "jaccard", "estimate",
                    "bands_shared", F.col("rank").cast("int").alias("rank")))
