"""The steps of a whole run on Spark (``lshjob run --engine spark``), for
:mod:`lshjob.jobs.run_spark`, which ties them into the run (registered in
:mod:`lshjob.index.engines` as the ``spark`` pipeline, imported only when chosen).

The steps hand DataFrames to each other (opaque to the caller) and give the driver counts
only; what a step writes goes to a folder given as a URI that Spark writes and every
executor reaches. What each computes: :mod:`lshjob.index.spark.events` and
:mod:`lshjob.index.spark.ranking`.
"""

from __future__ import annotations

from lshjob.index.spark import digest, events, ranking
from lshjob.index.spark.join import candidate_pairs
from lshjob.index.spark.session import SparkStage, quiet_pandas_warning, session


class SparkPipeline(SparkStage):
    """A run's steps on Spark (module docstring); ``held`` lists what it keeps in the
    executors until :meth:`release`."""

    def __init__(self) -> None:
        self.held: list = []

    def _hold(self, frame):
        self.held.append(ranking.held(frame))
        return self.held[-1]

    def read(self, path: str, spec):
        """(sets, facts): each entity's set (:func:`events.element_sets`) and what reading found."""
        quiet_pandas_warning()
        frame, facts = events.read_events(session(), path, spec)
        sets = events.element_sets(frame, spec, facts)
        self.held.append(sets)
        return sets, facts

    def input_digest(self, files: list[str]):
        """((bytes, sha256), records, None) of the files read, hashed on the executors, or
        (None, [], why) (:mod:`lshjob.index.spark.digest`)."""
        return digest.input_digest(session(), files)

    def collapse(self, sets):
        """(members, reps, representatives): ids, groups of identical sets (:mod:`ranking`)."""
        numbered = self._hold(ranking.numbered(sets))  # its ids computed once: both sides of the collapse read them
        members = self._hold(ranking.collapsed(numbered))
        reps = ranking.representatives(members)
        return members, reps, reps.count()

    def planning_sample(self, sets, entities: int, sample_size: int):
        return events.planning_sample(sets, entities, sample_size)

    def key_dtype(self, sets):
        return events.key_dtype(sets)

    def join(self, reps, params, bands: int, rows: int, max_bucket: int, out: str) -> dict:
        """Band the representatives and write their candidate pairs to ``out``; the skew report."""
        bucket_rows = ranking.bucket_rows(reps, params, bands, rows)
        with candidate_pairs(bucket_rows, bands, max_bucket, reps.count() * bands) as (pairs, skew):
            pairs.write.parquet(out)
        return skew

    def verify(self, candidates: str, reps, threshold: float, params, out: str) -> tuple[int, int]:
        """Verify the candidates in ``candidates`` into ``out``; (candidate pairs, verified pairs)."""
        spark = session()
        pairs = spark.read.parquet(candidates)
        ranking.verified_pairs(pairs, reps, threshold, params).write.parquet(out)
        return pairs.count(), spark.read.parquet(out).count()

    def publish(self, members, verified: str | None, top_k: int, bands: int, out: str) -> None:
        """Write each entity's ranked neighbours with their keys to ``out`` as Parquet parts
        whose names follow the sort (entity, then rank); ``verified`` None: no pair verified."""
        spark = session()
        pairs = (spark.read.parquet(verified) if verified is not None
                 else spark.createDataFrame([], ranking.VERIFIED_DDL))
        ranking.with_keys(ranking.ranked(members, pairs, top_k, bands), members).write.parquet(out)

    def release(self) -> None:
        for frame in self.held:
            frame.unpersist()
        self.held = []
