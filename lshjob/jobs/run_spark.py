"""``lshjob run --engine spark``: the whole run on Spark, publishing the local engine's rows.

Spark reads the events (``spark.read.parquet``: any path or URI Spark reads), groups them
by entity, signs, bands, joins, verifies and ranks the top k in its executors (the steps of
:mod:`lshjob.index.spark.pipeline`, loaded through :func:`lshjob.index.engines.get_pipeline`
so that only a Spark run imports pyspark); the driver holds counts, the plan and a planning
sample of sets: every set when there are no more than ``--sample-size`` entities (then the
plan is the local run's in one part), else a uniform sample by a hash of the key (as a run
in parts plans on a sample).

The final write goes through the driver, a Spark output file at a time: Spark writes the
ranked rows, sorted, as Parquet parts in a work folder beside the index (or in ``--scratch``),
and the driver streams them in order into ``neighbours.parquet``. The contract's one file has
a ``rank`` of UInt32 and the ``lshjob`` key-value record, which Spark's writer cannot give (no
unsigned type, no footer metadata). ``--out`` is a path of the driver (published as a local
run publishes, under the folder's lock) or a URI Arrow's file systems open (``file://``,
``hdfs://``, ``s3a://``, ``gs://``): how each is published, and locked, is
:mod:`lshjob.jobs.run_spark_out`. The work folder must be one every executor writes too.
"""

from __future__ import annotations

import time
from dataclasses import asdict
from pathlib import Path

import numpy as np

from lshjob.contracts.manifest import Manifest
from lshjob.core.sets import ElementSets
from lshjob.index import engines as stage_engines
from lshjob.index import publish
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.crowd_caps import skipped_warning
from lshjob.jobs.prepare import plan_run
from lshjob.jobs.run_spark_out import index_folder
from lshjob.runtime import provenance, stopping
from lshjob.runtime.budget import default_memory, parse_size
from lshjob.runtime.outputs import scratch_folder
from lshjob.runtime.progress import QUIET, StageProgress


def run_on_spark(events: str | Path, spec: EventSpec, options, out: str | Path, stages,
                 progress: StageProgress = QUIET, command: list[str] | None = None) -> dict:
    """The run of :func:`lshjob.jobs.run.run_job` on Spark (module docstring); ``stages``
    times each stage (:class:`lshjob.jobs.run._Stages`)."""
    source = str(events)
    folder = index_folder(out, source, options.scratch, options.wait)  # before anything is read or made
    scratch_folder(options.scratch)
    memory = parse_size(options.memory) if options.memory else default_memory()
    started, started_at = time.perf_counter(), provenance.utc_now()
    run_id = provenance.new_run_id(started_at)
    steps = stage_engines.get_pipeline(options.engine)
    try:
        warnings = folder.acquire()
        steps.prepare()  # a missing Java or a silent cluster stops the run here
        folder.make_work()
        read_from = str(Path(source).absolute()) if "://" not in source else source
        with stages("ingest"):
            sets, facts = steps.read(read_from, spec)
            total_digest, file_records, no_digest = steps.input_digest(facts.files)
            if no_digest:
                warnings.append(f"{source}: the input files were not digested ({no_digest}); "
                                "lshjob audit will not compare its events with them")
        with stages("collapse"):
            members, reps, n_reps = steps.collapse(sets)
        if facts.empty_after_filter:
            warnings.append(f"{facts.empty_after_filter} entities had no element left after --min-count "
                            f"{spec.min_count:g}; they are not in the index")
        with stages("plan"):
            sample, total = (_planning_sets(steps, sets, facts.entities, options.sample_size)
                             if options.threshold < 1.0 and n_reps >= 2 else (None, facts.entities))
            plan = plan_run(sample, options, total_entities=total, distinct_sets=n_reps)
            del sample
        counts = dict(events=facts.rows_read, entities=facts.entities, membership_rows=facts.membership_rows,
                      empty_after_filter=facts.empty_after_filter, null_rows_dropped=facts.null_rows_dropped,
                      parts=1, representatives=n_reps, entities_in_identical_groups=facts.entities - n_reps)
        skew, verified = None, None
        if plan.banded:
            params = plan.signature_params()
            counts["bucket_rows"] = n_reps * plan.bands
            with stages("join"):  # signing and banding run in the join's first Spark stage
                skew = steps.join(reps, params, plan.bands, plan.rows, options.max_bucket,
                                  folder.work_uri("candidates"))
            if skew["skipped_pairs"]:
                warnings.append(skipped_warning({**skew, "max_bucket": options.max_bucket}, options, False, False))
            with stages("verify"):
                verified = folder.work_uri("verified")
                counts["candidate_pairs"], counts["verified_pairs"] = steps.verify(
                    folder.work_uri("candidates"), reps, options.threshold, params, verified)
        else:  # identical sets only: no bands; the groups are the index
            counts.update(bucket_rows=0, candidate_pairs=0, verified_pairs=0)
        top_k = publish.effective_top_k(options.top_k, facts.entities)
        if top_k < options.top_k and facts.entities > 1:
            warnings.append(f"--top-k {options.top_k} is more than the {facts.entities - 1} other entities; "
                            f"used {top_k}")
        with stages("publish"):
            steps.publish(members, verified, top_k, plan.bands or 0, folder.work_uri("neighbours"))
            meta = provenance.neighbours_metadata(run_id, options, spec, top_k)
            written = folder.stage(steps.key_dtype(sets), meta, warnings)
        counts["published_rows"] = written["rows"]
        if counts["published_rows"] == 0 and facts.entities > 1:
            warnings.append("no pair reached the threshold: the index is empty")
        manifest = Manifest(
            run_id=run_id, started_at=provenance.iso(started_at), host=provenance.host(),
            command=list(command) if command is not None else None,
            inputs={"source": read_from, "given": source, "files": file_records or [{"path": f} for f in facts.files],
                    "bytes": total_digest and total_digest[0], "rows": facts.rows_read,
                    "sha256": total_digest and total_digest[1], "time_range": None},
            spec=asdict(spec), options=asdict(options), top_k_effective=top_k, memory_budget_bytes=memory,
            plan=plan.to_dict(), engines=options.engine_names(), counts=counts, skew=skew,
            peak_memory_bytes=stages.peak,
            versions={**provenance.versions(), **steps.engine_versions()},
            output=written, out=folder.name, warnings=warnings,
            seconds=dict(stages.seconds, total=round(time.perf_counter() - started, 3)),
            finished_at=provenance.iso(provenance.utc_now()),
        ).to_json()
        with stopping.held():
            folder.commit(manifest)
            stopping.mark_published()
        return manifest
    finally:
        steps.release()
        folder.close()


def _planning_sets(steps, sets, entities: int, sample_size: int) -> tuple[ElementSets, int | None]:
    """(sets, total_entities) for :func:`lshjob.jobs.prepare.plan_run`: every set when there
    are at most ``sample_size`` entities (total None: the local run's plan), else about
    ``sample_size`` of them (:func:`lshjob.index.spark.events.planning_sample`). The codes
    are the elements' hashes, which stand for them (exact Jaccard, as the run checked)."""
    table = steps.planning_sample(sets, entities, sample_size)
    sizes = table["hashes"].list.len().to_numpy().astype(np.int64)
    offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    codes = np.ascontiguousarray(table["hashes"].explode().to_numpy(), dtype=np.int64)  # sorted in each set
    return ElementSets(table["entity"], offsets, codes), (entities if entities > sample_size else None)
