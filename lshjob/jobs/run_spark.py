"""``lshjob run --engine spark``: the whole run on Spark, publishing the local engine's rows.

Spark reads the events (``spark.read.parquet``: any path or URI Spark reads), groups them
by entity, signs, bands, joins, verifies and ranks the top k in its executors
(:mod:`lshjob.index.spark.events`, :mod:`lshjob.index.spark.ranking`); the driver holds
counts, the plan and a planning sample of sets (every set when there are no more than
``--sample-size`` entities: then the plan is the local run's in one part; else a uniform
sample by a hash of the key, as a run in parts plans on a sample).

The final write goes through the driver, a Spark output file at a time: Spark writes the
ranked rows, sorted, as Parquet parts in the work folder, and the driver streams them in
order into ``neighbours.parquet`` (:func:`lshjob.index.publish.stage_neighbours`). The
contract's one file has a ``rank`` of UInt32 and the ``lshjob`` key-value record, which
Spark's writer cannot give (no unsigned type, no footer metadata), and the index is
published by renames under the output folder's lock (:mod:`lshjob.runtime.folder_lock`), which
object stores do not offer: ``--out`` is a folder of the driver's file system (a path or a
``file://`` URI). The work folder (``--scratch``, else inside ``--out``) must be one every
executor writes too: on one machine any folder, on a cluster a shared mount.
"""

from __future__ import annotations

import shutil
import time
from dataclasses import asdict
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.contracts.manifest import Manifest
from lshjob.contracts.tables import NEIGHBOURS
from lshjob.core.sets import ElementSets
from lshjob.index import engines as stage_engines
from lshjob.index import publish
from lshjob.index.spark import events as spark_events
from lshjob.index.spark import ranking
from lshjob.index.spark.join import candidate_pairs
from lshjob.index.spark.session import quiet_pandas_warning, session
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.prepare import plan_run
from lshjob.runtime import provenance, stopping
from lshjob.runtime.budget import default_memory, parse_size
from lshjob.runtime.folder_lock import output_lock
from lshjob.runtime.outputs import output_folder, scratch_folder
from lshjob.runtime.progress import QUIET, StageProgress
from lshjob.runtime.workspace import remove_leftovers, work_folder


def local_path(given: str | Path) -> str | Path:
    """A ``file://`` URI as the path it names; anything else as given."""
    text = str(given)
    return text[len("file://"):] if text.startswith("file://") else given


def _uri(path: Path) -> str:
    return path.absolute().as_uri()


def run_on_spark(events: str | Path, spec: EventSpec, options, out: str | Path, stages,
                 progress: StageProgress = QUIET, command: list[str] | None = None) -> dict:
    """The run of :func:`lshjob.jobs.run.run_job` on Spark (module docstring); ``stages``
    times each stage (:class:`lshjob.jobs.run._Stages`)."""
    from pyspark import StorageLevel

    source = str(events)
    is_local = "://" not in source or source.startswith("file://")
    out = output_folder(local_path(out), [local_path(source)] if is_local else [], "run")
    scratch_folder(options.scratch)
    memory = parse_size(options.memory) if options.memory else default_memory()
    lock = output_lock(out, wait=options.wait, what="index").acquire()
    work = work_folder(out, options.scratch)
    started, started_at = time.perf_counter(), provenance.utc_now()
    run_id = provenance.new_run_id(started_at)
    held = []
    try:
        warnings = lock.notes + remove_leftovers(out, options.scratch)
        quiet_pandas_warning()
        spark = session()
        work.mkdir(parents=True)
        read_from = str(Path(source).absolute()) if "://" not in source else source
        with stages("ingest"):
            frame, facts = spark_events.read_events(spark, read_from, spec)
            sets = spark_events.element_sets(frame, spec, facts)
            held.append(sets)
        with stages("collapse"):
            members = ranking.collapsed(ranking.numbered(sets)).persist(StorageLevel.MEMORY_AND_DISK)
            held.append(members)
            reps = ranking.representatives(members)
            n_reps = reps.count()
        if facts.empty_after_filter:
            warnings.append(f"{facts.empty_after_filter} entities had no element left after --min-count "
                            f"{spec.min_count:g}; they are not in the index")
        with stages("plan"):
            sample, total = (planning_sets(sets, facts.entities, options.sample_size)
                             if options.threshold < 1.0 and n_reps >= 2 else (None, facts.entities))
            plan = plan_run(sample, options, total_entities=total, distinct_sets=n_reps)
            del sample
        counts = dict(events=facts.rows_read, entities=facts.entities, membership_rows=facts.membership_rows,
                      empty_after_filter=facts.empty_after_filter, null_rows_dropped=facts.null_rows_dropped,
                      parts=1, representatives=n_reps, entities_in_identical_groups=facts.entities - n_reps)
        skew = None
        verified_at = work / "verified"
        if plan.banded:
            params = plan.signature_params()
            counts.update(bucket_rows=n_reps * plan.bands)
            with stages("join"):
                rows = ranking.bucket_rows(reps, params, plan.bands, plan.rows)
                with candidate_pairs(rows, plan.bands, options.max_bucket, n_reps * plan.bands) as (pairs, skew):
                    pairs.write.parquet(_uri(work / "candidates"))
            counts["shared_bucket_rows"] = None  # not counted apart: the join keeps them in Spark
            if skew["skipped_pairs"]:
                warnings.append(f"{skew['skipped_pairs']} pairs of oversize buckets (over --max-bucket "
                                f"{options.max_bucket}, still over it once split) were not compared")
            with stages("verify"):
                candidates = spark.read.parquet(_uri(work / "candidates"))
                counts["candidate_pairs"] = candidates.count()
                ranking.verified_pairs(candidates, reps, options.threshold, params).write.parquet(_uri(verified_at))
                verified = spark.read.parquet(_uri(verified_at))
                counts["verified_pairs"] = verified.count()
        else:  # identical sets only: no bands; the groups are the index
            counts.update(bucket_rows=0, candidate_pairs=0, verified_pairs=0)
            verified = spark.createDataFrame([], ranking.VERIFIED_DDL)
        top_k = publish.effective_top_k(options.top_k, facts.entities)
        if top_k < options.top_k and facts.entities > 1:
            warnings.append(f"--top-k {options.top_k} is more than the {facts.entities - 1} other entities; "
                            f"used {top_k}")
        with stages("publish"):
            rows = ranking.with_keys(ranking.ranked(members, verified, top_k, plan.bands or 0), members)
            rows.write.parquet(_uri(work / "neighbours"))
            meta = provenance.neighbours_metadata(run_id, options, spec, top_k)
            key = pl.from_arrow(sets.select("entity").limit(0).toArrow()).schema["entity"]
            facts_out = publish.stage_neighbours(out, _parts(work / "neighbours", key), meta)
        counts["published_rows"] = facts_out["rows"]
        if counts["published_rows"] == 0 and facts.entities > 1:
            warnings.append("no pair reached the threshold: the index is empty")
        manifest = Manifest(
            run_id=run_id, started_at=provenance.iso(started_at), host=provenance.host(),
            command=list(command) if command is not None else None,
            inputs={"source": read_from, "given": source, "files": [{"path": f} for f in facts.files],
                    "bytes": None, "rows": facts.rows_read, "sha256": None, "time_range": None},
            spec=asdict(spec), options=asdict(options), top_k_effective=top_k, memory_budget_bytes=memory,
            plan=plan.to_dict(), engines=options.engine_names(), counts=counts, skew=skew,
            peak_memory_bytes=stages.peak,
            versions={**provenance.versions(), **stage_engines.engine_versions(options.engine_names())},
            output=facts_out, out=str(out.absolute()), warnings=warnings,
            seconds=dict(stages.seconds, total=round(time.perf_counter() - started, 3)),
            finished_at=provenance.iso(provenance.utc_now()),
        ).to_json()
        with stopping.held():
            publish.commit_index(out, manifest)
            stopping.mark_published()
        return manifest
    finally:
        for frame in held:
            frame.unpersist()
        shutil.rmtree(work, ignore_errors=True)
        publish.discard_staging(out)
        lock.release()


def planning_sets(sets, entities: int, sample_size: int) -> tuple[ElementSets, int | None]:
    """(sets, total_entities) for :func:`lshjob.jobs.prepare.plan_run`: every set when there
    are at most ``sample_size`` entities (total None: the local run's plan), else about
    ``sample_size`` entities drawn by a hash of the key (a uniform sample, the same every run)."""
    from pyspark.sql import functions as F  # noqa: N812

    picked = sets
    if entities > sample_size:
        scale = 1 << 20
        picked = sets.where(F.pmod(F.xxhash64("entity"), F.lit(scale)) < int(scale * sample_size / entities) + 1)
    table = pl.from_arrow(picked.select("entity", "hashes").orderBy("entity").toArrow())
    sizes = table["hashes"].list.len().to_numpy().astype(np.int64)
    offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    codes = np.ascontiguousarray(table["hashes"].explode().to_numpy(), dtype=np.int64)  # sorted in each set
    return ElementSets(table["entity"], offsets, codes), (entities if entities > sample_size else None)


def _parts(folder: Path, key: pl.DataType):
    """The rows Spark wrote into ``folder``, part after part (their names are in partition
    order, the order of the sort), as NEIGHBOURS tables; one empty table when none holds a row."""
    wrote = False
    for part in sorted(folder.glob("part-*.parquet")):
        table = pl.read_parquet(part)
        if table.height:
            wrote = True
            yield NEIGHBOURS.conform(table)
    if not wrote:
        yield NEIGHBOURS.empty(key=key)
