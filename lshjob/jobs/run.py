"""The whole job: ingest -> collapse -> plan -> sign -> band -> join -> verify -> publish.

:func:`run_job` is what ``lshjob run`` calls. Each stage is timed, its peak resident memory
recorded, and its counts kept for the manifest. One run at a time writes to an output folder
(its lock, :mod:`lshjob.runtime.folder_lock`, is taken before any work). Scratch files live in a work
folder inside the output folder (or under ``--scratch``) and are removed at the end, and what
killed runs left is removed at the start (:mod:`lshjob.runtime.workspace`); the published index changes
only by the atomic renames of :func:`lshjob.index.publish.commit_index`. The manifest returned is the
one written, provenance included (:mod:`lshjob.runtime.provenance`), typed by
:class:`lshjob.contracts.manifest.Manifest`.

The plan comes before signing: it chooses k. In parts a ``count`` stage comes first, and
ingest, collapse, sign and band run for each key range in turn. The order and the tables
handed from stage to stage are declared in :mod:`lshjob.contracts.tables` (``STAGES``).
"""

from __future__ import annotations

import shutil
import time
from dataclasses import asdict
from pathlib import Path

import numpy as np

from lshjob.contracts.manifest import Manifest
from lshjob.core.digest import digest_in_background
from lshjob.errors import ParameterError
from lshjob.index import engines as stage_engines
from lshjob.index import publish
from lshjob.index.collapse import every_band_when_identical, move_pair_blocks
from lshjob.index.join import JoinSettings, duckdb_limit, duckdb_need, join_threads, require_duckdb_memory
from lshjob.index.verify import VerifySettings, empty_verified
from lshjob.ingest.loading import grouping_need, open_events
from lshjob.ingest.spec import EventSpec, resolve_paths
from lshjob.jobs import prepare
from lshjob.jobs.crowd_caps import crowd_cap, reserve_cap, skipped_warning
from lshjob.jobs.options import RunOptions  # the run's Python API (declared with the options)
from lshjob.runtime import provenance, stopping
from lshjob.runtime.budget import (
    Budget,
    current_bytes,
    default_memory,
    parse_size,
    peak_bytes,
    release_freed,
    reset_peak,
)
from lshjob.runtime.folder_lock import output_lock
from lshjob.runtime.outputs import output_folder, scratch_folder
from lshjob.runtime.partitions import HeldSets
from lshjob.runtime.progress import QUIET, StageProgress
from lshjob.runtime.remote import is_uri, local_or_none
from lshjob.runtime.workspace import remove_leftovers, work_folder


def _verify_settings(memory: int, top_k: int | None = None, group_sizes=None, tally: dict | None = None
                     ) -> VerifySettings:
    """How much verification holds at a time (:class:`lshjob.runtime.budget.Budget`); with
    ``top_k``, the pairs that can enter no list are left out (:class:`VerifySettings`). The
    candidates are pairs of representatives, whose sets differ."""
    limit = Budget(memory)
    return VerifySettings(slice_rows=limit.verify_slice_rows(), estimate_bytes=limit.estimate_bytes(),
                          held_rows=limit.verify_held_rows(),
                          top_k=top_k, group_sizes=group_sizes, tally=tally, distinct_sets=True)


class _Stages:
    """Timings, peak memory and counts per stage."""

    def __init__(self, progress: StageProgress) -> None:
        self.progress = progress
        self.seconds: dict[str, float] = {}
        self.cpu: dict[str, float] = {}  # the process's CPU seconds (all its threads), steadier than the wall clock
        self.peak: dict[str, int] = {}

    def __call__(self, name: str, total: int = 1):
        """Time a stage, with its own progress bar; a stage entered again adds up."""
        stages = self

        class _Ctx:
            def __enter__(self):
                reset_peak()
                self.start, self.cpu = time.perf_counter(), time.process_time()
                self.task = stages.progress.stage(name, total)
                return self.task.__enter__()

            def __exit__(self, *exc):
                self.task.__exit__(*exc)
                stages.add(name, self.start, self.cpu)

        return _Ctx()

    def part(self, name: str):
        """Time one more piece of a stage that runs in pieces (seconds add up, peaks max)."""
        stages = self

        class _Part:
            def __enter__(self):
                reset_peak()
                self.start, self.cpu = time.perf_counter(), time.process_time()

            def __exit__(self, *exc):
                stages.add(name, self.start, self.cpu)

        return _Part()

    def add(self, name: str, start: float, cpu: float) -> None:
        """Add the wall and CPU seconds since ``start`` and ``cpu`` to stage ``name``; its peak."""
        self.seconds[name] = round(self.seconds.get(name, 0.0) + time.perf_counter() - start, 3)
        self.cpu[name] = round(self.cpu.get(name, 0.0) + time.process_time() - cpu, 3)
        self.peak[name] = max(self.peak.get(name, 0), peak_bytes())


def run_job(
    events: str | Path,
    spec: EventSpec,
    options: RunOptions,
    out: str | Path,
    progress: StageProgress = QUIET,
    command: list[str] | None = None,
) -> dict:
    """Build and publish the neighbour index of ``events`` into ``out``; return the manifest
    (the same record as ``out/manifest.json``). ``command``: the command line, when run
    from one."""
    options.validate()
    stage_engines.configure(spark_master=options.spark_master)
    if spec.segment is not None or spec.period is not None:
        raise ParameterError("lshjob run signs one set per entity; sign segments or periods with lshjob sign")
    if options.engine == "spark":  # the whole run on Spark, reading the events there too
        from lshjob.jobs.run_spark import run_on_spark

        return run_on_spark(events, spec, options, out, _Stages(progress), progress, command)
    if is_uri(out) and local_or_none(out) is None:
        raise ParameterError(f"--out {out}: an index folder named by a URI is written by --engine spark; "
                             "this engine writes a folder of this machine")
    out = output_folder(local_or_none(out) or out, [events], "run")  # before anything is read or made
    scratch_folder(options.scratch)
    memory = parse_size(options.memory) if options.memory else default_memory()
    lock = output_lock(out, wait=options.wait, what="index").acquire()  # before any work, or Busy
    work = work_folder(out, options.scratch)
    stages = _Stages(progress)
    counts: dict[str, object] = {}
    started, started_cpu = time.perf_counter(), time.process_time()
    started_at = provenance.utc_now()
    run_id = provenance.new_run_id(started_at)
    try:
        warnings = lock.notes + remove_leftovers(out, options.scratch)  # holding the lock: all are dead runs'
        stage_engines.prepare(options.engine_names())  # a missing library or a silent cluster stops it here
        # started first: reading and hashing the files (no GIL) fills the other core while the
        # process's first compiled call loads numba's registries (GIL-bound) during the checks
        digest = digest_in_background([str(p) for p in resolve_paths(events)[0]])
        with stages("ingest"):
            source = open_events(events, spec)
        in_parts = not Budget(memory, options.parts).one_part(grouping_need(source))
        built = (prepare.in_parts if in_parts else prepare.in_one_part)(source, options, memory, work, stages)
        report, plan = built.report, built.plan
        warnings += built.warnings
        counts.update(events=report.rows_read, entities=len(built.keys), membership_rows=report.membership_rows,
                      empty_after_filter=report.empty_after_filter, null_rows_dropped=report.null_rows_dropped,
                      parts=len(built.store.ranges), representatives=built.representatives,
                      entities_in_identical_groups=int(len(built.keys) - built.representatives))
        if report.empty_after_filter:
            warnings.append(f"{report.empty_after_filter} entities had no element left after --min-count "
                            f"{source.min_count:g}; they are not in the index")

        top_k = publish.effective_top_k(options.top_k, len(built.keys))
        if built.bucket_files is None:  # identical sets only: no bands; across parts, by fingerprint
            skew = None
            counts.update(bucket_rows=0, candidate_pairs=built.identical_pairs)
            with stages("verify"):
                verified = (options.stage_engine("verify").verify(built.candidates, built.store, 1.0, None,
                                                            _verify_settings(memory))
                            if built.candidates is not None else empty_verified())
            counts["verified_pairs"] = verified.height
        else:
            counts["bucket_rows"] = built.bucket_rows
            counts["shared_bucket_rows"] = built.shared_rows
            with stages("join"):
                # DuckDB gets what the budget leaves beside what the process holds, less what
                # it takes beyond its limit; held sets go to the work folder when that is short.
                threads = join_threads()
                release_freed()
                limit = duckdb_limit(memory, current_bytes(), built.shared_rows, threads)
                if limit < duckdb_need(built.shared_rows) and isinstance(built.store, HeldSets):
                    built.store = built.store.saved(work / "sets")
                    release_freed()
                    limit = duckdb_limit(memory, current_bytes(), built.shared_rows, threads)
                require_duckdb_memory(limit, built.shared_rows, current_bytes(), memory, threads)
                settings = JoinSettings(memory_limit=f"{limit // 2**20}MiB", temp_directory=str(work / "spill"),
                                        threads=threads, max_bucket=options.max_bucket,
                                        max_crowd=crowd_cap(options, in_parts),
                                        reserve_cap=reserve_cap(options, in_parts))
                candidates = work / ("candidates" if in_parts else "candidates.parquet")
                joined = options.stage_engine("join").candidates(
                    built.bucket_files, plan.bands, candidates, settings, built.bucket_rows,
                    ranges=built.store.ranges if in_parts else None)
            skew = joined.skew
            counts["candidate_pairs"] = joined.pairs
            if in_parts:  # identical sets of different parts, met or not in a band (not the join's pairs)
                move_pair_blocks(built.candidates, candidates)
                counts["identical_pairs_across_parts"] = built.identical_pairs

            with stages("verify"):
                crowds = {} if joined.crowds is None else {"crowds": joined.crowds}  # large buckets' members
                if joined.reserve is not None:  # buckets over the cap, compared when their lists have room
                    crowds["reserve"] = joined.reserve
                # pairs that can enter no list are dropped before their estimates (never published)
                tally: dict = {}
                settings = _verify_settings(memory, top_k, np.bincount(built.rep_of, minlength=len(built.rep_of)),
                                            tally)
                verified = options.stage_engine("verify").verify(candidates, built.store, options.threshold,
                                                                 built.params, settings, **crowds)
                if in_parts:
                    verified = every_band_when_identical(verified, plan.bands)
            counts["verified_pairs"] = tally.get("over_threshold", verified.height)
            counts["pairs_for_lists"] = verified.height
            if "reserve" in tally:
                counts["oversize_buckets_compared"] = tally["reserve"]["compared"]
                if tally["reserve"].get("crowds_cut"):
                    warnings.append(f"{tally['reserve']['crowds_cut']} oversize buckets compared whole found more "
                                    "pairs over the threshold than one crowd may write (16.8 million); only those "
                                    "were kept")
            skipped = skipped_warning(skew, options, in_parts, joined.rows_per_band, tally.get("reserve"))
            if skipped:
                warnings.append(skipped)
            if tally.get("crowds_cut"):
                warnings.append(f"{tally['crowds_cut']} crowds found more pairs over the threshold than one crowd may "
                                "write (16.8 million); only those were kept: lower --max-crowd to split them")
        built.store = None  # the sets are not needed any more: publishing gets their memory

        if top_k < options.top_k and len(built.keys) > 1:
            warnings.append(f"--top-k {options.top_k} is more than the {len(built.keys) - 1} other entities; "
                            f"used {top_k}")
        with stages("publish"):
            # blocks sized from what the budget leaves beside what the process holds
            release_freed()
            expansion = publish.expand(verified, built.rep_of, top_k, plan.bands or 0)
            del verified
            publish.check_output(expansion.published_rows, built.keys, options.top_k, memory,
                                 publish.identical_rows(built.rep_of, top_k)[2])
            meta = provenance.neighbours_metadata(run_id, options, spec, top_k)
            release_freed()
            blocks = publish.neighbour_blocks(expansion, built.keys, publish.block_rows(memory, current_bytes()))
            facts = publish.stage_neighbours(out, blocks, meta)
        counts["published_rows"] = facts["rows"]
        if counts["published_rows"] == 0 and len(built.keys) > 1:  # one entity is warned of when planning
            warnings.append("no pair reached the threshold: the index is empty")
        manifest = Manifest(
            run_id=run_id,
            started_at=provenance.iso(started_at),
            host=provenance.host(),
            command=list(command) if command is not None else None,
            inputs=provenance.inputs(events, report, digest),
            spec=asdict(spec),
            options=asdict(options),
            top_k_effective=top_k,
            memory_budget_bytes=memory,
            plan=plan.to_dict(),
            engines=options.engine_names(),
            counts=counts,
            skew=skew,
            peak_memory_bytes=stages.peak,
            versions={**provenance.versions(), **stage_engines.engine_versions(options.engine_names())},
            output=facts,
            out=str(out.absolute()),
            warnings=warnings,
            seconds=dict(stages.seconds, total=round(time.perf_counter() - started, 3)),
            cpu_seconds=dict(stages.cpu, total=round(time.process_time() - started_cpu, 3)),
            finished_at=provenance.iso(provenance.utc_now()),
        ).to_json()  # what the file holds, exactly, and what --json prints
        with stopping.held():  # a stop signal waits: the index is renamed whole or not at all
            publish.commit_index(out, manifest)
            stopping.mark_published()
        return manifest
    finally:
        shutil.rmtree(work, ignore_errors=True)
        publish.discard_staging(out)
        lock.release()  # and the folder, when the lock made it and nothing was written


