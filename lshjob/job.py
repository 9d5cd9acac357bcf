"""The whole job: ingest -> sign -> plan -> band -> join -> verify -> publish.

:func:`run_job` is what ``lshjob run`` calls. Each stage is timed, its peak resident memory
recorded, and its counts kept for the manifest. One run at a time writes to an output folder
(its lock, :mod:`lshjob.folder_lock`, is taken before any work). Scratch files live in a work
folder inside the output folder (or under ``--scratch``) and are removed at the end, and what
killed runs left is removed at the start (:mod:`lshjob.scratch`); the published index changes
only by the atomic renames of :func:`lshjob.publish.publish_index`.
"""

from __future__ import annotations

import os
import platform
import shutil
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import polars as pl

from . import __version__, parts, planner, prepare
from .digest import digest_in_background
from .errors import ParameterError
from .folder_lock import output_lock
from .ingest import EventSpec, resolve_paths
from .join import DEFAULT_MAX_BUCKET, JoinSettings, candidate_pairs
from .loading import grouping_need, open_events
from .progress import QUIET, StageProgress
from .publish import neighbour_table, publish_index
from .resources import current_bytes, default_memory, parse_size, peak_bytes, reset_peak
from .scratch import remove_leftovers, work_folder
from .signatures import SignatureParams


MAX_TOP_K = 2**31 - 1  # ranks are 32-bit


@dataclass(frozen=True)
class RunOptions:
    threshold: float
    top_k: int = 50
    perms: int | None = None
    bands: int | None = None
    rows: int | None = None
    recall: float = 0.95
    sample_size: int = 2000
    seed: int = 1
    scheme: str = "kperm"
    max_bucket: int = DEFAULT_MAX_BUCKET
    max_candidates: float = 2e9
    memory: str | None = None
    parts: int | None = None  # key ranges held one at a time; None: as the memory budget needs
    wait: float = 0.0  # seconds to wait for another run's lock on the output folder
    scratch: str | None = None  # folder for the work folder (spill, parts); None: inside the output

    def validate(self) -> None:
        if not 0.0 < self.threshold <= 1.0:
            raise ParameterError(f"--threshold must be in (0, 1]; got {self.threshold}")
        if not 1 <= self.top_k <= MAX_TOP_K:
            raise ParameterError(f"--top-k must be from 1 to {MAX_TOP_K}; got {self.top_k}")
        if not self.max_candidates >= 0:  # NaN fails too
            raise ParameterError(f"--max-candidates must be 0 or more; got {self.max_candidates:g}")
        if (self.bands is None) != (self.rows is None):
            raise ParameterError("--bands and --rows go together; give both or neither")
        if self.bands is not None:
            planner.check_explicit(self.perms or 128, self.bands, self.rows)
        if self.perms is not None and self.perms < 1:
            raise ParameterError(f"--perms must be at least 1; got {self.perms}")
        if self.max_bucket < 2:
            raise ParameterError(f"--max-bucket must be at least 2; got {self.max_bucket}")
        if self.sample_size < 2:
            raise ParameterError(f"--sample-size must be at least 2; got {self.sample_size}")
        if self.memory is not None:
            parse_size(self.memory)
        if self.parts is not None and self.parts < 1:
            raise ParameterError(f"--parts must be at least 1; got {self.parts}")
        if not self.wait >= 0:
            raise ParameterError(f"--wait must be 0 or more seconds; got {self.wait}")
        SignatureParams(scheme=self.scheme)


class _Stages:
    """Timings, peak memory and counts per stage."""

    def __init__(self, progress: StageProgress) -> None:
        self.progress = progress
        self.seconds: dict[str, float] = {}
        self.peak: dict[str, int] = {}

    def __call__(self, name: str, total: int = 1):
        """Time a stage, with its own progress bar; a stage entered again adds up."""
        stages = self

        class _Ctx:
            def __enter__(self):
                reset_peak()
                self.start = time.perf_counter()
                self.task = stages.progress.stage(name, total)
                return self.task.__enter__()

            def __exit__(self, *exc):
                self.task.__exit__(*exc)
                stages.seconds[name] = round(stages.seconds.get(name, 0.0) + time.perf_counter() - self.start, 3)
                stages.peak[name] = max(stages.peak.get(name, 0), peak_bytes())

        return _Ctx()

    def part(self, name: str):
        """Time one more piece of a stage that runs in pieces (seconds add up, peaks max)."""
        stages = self

        class _Part:
            def __enter__(self):
                reset_peak()
                self.start = time.perf_counter()

            def __exit__(self, *exc):
                stages.seconds[name] = round(stages.seconds.get(name, 0.0) + time.perf_counter() - self.start, 3)
                stages.peak[name] = max(stages.peak.get(name, 0), peak_bytes())

        return _Part()


def run_job(
    events: str | Path,
    spec: EventSpec,
    options: RunOptions,
    out: str | Path,
    progress: StageProgress = QUIET,
) -> dict:
    """Build and publish the neighbour index of ``events`` into ``out``; return the manifest."""
    options.validate()
    if spec.segment is not None or spec.period is not None:
        raise ParameterError("lshjob run signs one set per entity; sign segments or periods with lshjob sign")
    out = Path(out)
    memory = parse_size(options.memory) if options.memory else default_memory()
    lock = output_lock(out, wait=options.wait, what="index").acquire()  # before any work, or Busy
    work = work_folder(out, options.scratch)
    stages = _Stages(progress)
    counts: dict[str, object] = {}
    started = time.perf_counter()
    try:
        warnings = lock.notes + remove_leftovers(out, options.scratch)  # holding the lock: all are dead runs'
        # started first: reading and hashing the files (no GIL) fills the other core while the
        # process's first compiled call loads numba's registries (GIL-bound) during the checks
        digest = digest_in_background([str(p) for p in resolve_paths(events)[0]])
        with stages("ingest"):
            source = open_events(events, spec)
        in_parts = (options.parts or 0) > 1 or (
            options.parts is None and grouping_need(source) > parts.ONE_PART_SHARE * memory)
        built = (prepare.in_parts if in_parts else prepare.in_one_part)(source, options, memory, work, stages)
        report, plan = built.report, built.plan
        counts.update(events=report.rows_read, entities=len(built.keys), membership_rows=report.membership_rows,
                      empty_after_filter=report.empty_after_filter, null_rows_dropped=report.null_rows_dropped,
                      parts=len(built.store.ranges), representatives=built.representatives,
                      entities_in_identical_groups=int(len(built.keys) - built.representatives))

        if built.bucket_files is None:  # identical sets only: no bands; across parts, by fingerprint
            skew = None
            counts.update(bucket_rows=0, candidate_pairs=built.identical_pairs)
            with stages("verify"):
                verified = (parts.verify_blocks(built.candidates, built.store, 1.0, None, memory)
                            if built.candidates is not None else parts.empty_verified())
            counts["verified_pairs"] = verified.height
        else:
            counts["bucket_rows"] = built.bucket_rows
            counts["shared_bucket_rows"] = built.shared_rows
            with stages("join"):
                # DuckDB gets what the budget leaves beside the sets and keys held here.
                duck = max(memory - current_bytes(), memory // 4, 128 * 2**20)
                settings = JoinSettings(memory_limit=f"{duck // 2**20}MiB",
                                        temp_directory=str(work / "spill"), max_bucket=options.max_bucket)
                candidates = work / ("candidates" if in_parts else "candidates.parquet")
                joined = candidate_pairs(built.bucket_files, candidates, settings, plan["bands"], built.bucket_rows,
                                         part_ranges=built.store.ranges if in_parts else None)
            skew = joined["skew"]
            counts["candidate_pairs"] = joined["candidate_pairs"]

            with stages("verify"):
                verified = parts.verify_blocks(candidates, built.store, options.threshold, built.params, memory)
            counts["verified_pairs"] = verified.height

        with stages("publish"):
            table = neighbour_table(verified, built.rep_of, built.keys, options.top_k, plan.get("bands", 0))
        counts["published_rows"] = table.height
        manifest = {
            "format": "lshjob-index",
            "format_version": 1,
            "inputs": _inputs(events, report, digest.result()),
            "spec": asdict(spec),
            "options": asdict(options),
            "memory_budget_bytes": memory,
            "plan": plan,
            "counts": counts,
            "skew": skew,
            "seconds": stages.seconds,
            "peak_memory_bytes": stages.peak,
            "versions": _versions(),
            "warnings": warnings,
        }
        write_start = time.perf_counter()
        facts = publish_index(out, table, manifest)
        manifest["seconds"] = dict(stages.seconds, write=round(time.perf_counter() - write_start, 3))
        manifest["output"] = facts
        manifest["seconds"]["total"] = round(time.perf_counter() - started, 3)
        manifest["out"] = str(out)
        return manifest
    finally:
        shutil.rmtree(work, ignore_errors=True)
        lock.release()


def _inputs(events, report, digest: tuple[int, str]) -> dict:
    sizes, sha256 = digest
    return {"source": str(events), "files": report.files, "bytes": sizes, "rows": report.rows_read,
            "sha256": sha256}


def _versions() -> dict:
    import duckdb
    import numba

    return {"lshjob": __version__, "python": platform.python_version(), "polars": pl.__version__,
            "numpy": np.__version__, "duckdb": duckdb.__version__, "numba": numba.__version__}
