"""Spark engines of the band, join and verify stages (registered as ``spark``).

Spark does the shuffles (bucket rows grouped by bucket, the bucket self-join, candidate
deduplication, candidates joined to their sets); the values themselves come from the
project's compiled kernels, run on Arrow batches inside the executors' Python workers
(``mapInArrow``): the bucket keys' definition (:mod:`lshjob.index.band.base`), exact Jaccard
(:mod:`lshjob.index.verify._jaccard`) and signing (:mod:`lshjob.sign.signatures`) for the
estimate. The engines keep the stage contracts of :mod:`lshjob.index.band.base`,
:mod:`lshjob.index.join.base` and :mod:`lshjob.index.verify.base` and pass
:mod:`lshjob.index.conformance`.

A whole run on Spark (``--engine spark``) also reads, hashes, groups, signs and bands the
events on the executors (:mod:`lshjob.index.spark.events`), and numbers the entities, groups
identical sets, verifies and ranks the top k as Spark plans (:mod:`lshjob.index.spark.ranking`);
:mod:`lshjob.index.spark.pipeline` gives these steps to :mod:`lshjob.jobs.run_spark`.

Only the modules of this package import pyspark (``.importlinter`` keeps the rest of lshjob
free of it), and only when an engine named ``spark`` is chosen. The stage engines' inputs
and outputs are Parquet files on a path the driver and every executor read and write alike
(one machine, or a shared file system); a whole run reads its events from any URI Spark reads.
"""
