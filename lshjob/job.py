"""The whole job: ingest -> sign -> plan -> band -> join -> verify -> publish.

:func:`run_job` is what ``lshjob run`` calls. Each stage is timed, its peak resident memory
recorded, and its counts kept for the manifest. Scratch files live in a work folder inside
the output folder and are removed at the end; the published index changes only by the
atomic renames of :func:`lshjob.publish.publish_index`.
"""

from __future__ import annotations

import hashlib
import os
import platform
import shutil
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import polars as pl

from . import __version__, planner, similarity
from . import band
from .errors import InputError, ParameterError
from .identical import collapse_identical
from . import parts
from .ingest import EventSpec, IngestReport
from .join import DEFAULT_MAX_BUCKET, JoinSettings, candidate_pairs
from .loading import grouping_need, membership_of, open_events
from .membership import Membership
from .progress import QUIET, StageProgress
from .publish import neighbour_table, publish_index
from .resources import current_bytes, default_memory, parse_size, peak_bytes, reset_peak
from .signatures import SignatureParams, comparable_by_position

MIN_PLANNING_THRESHOLD = 1e-6


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

    def validate(self) -> None:
        if not 0.0 < self.threshold <= 1.0:
            raise ParameterError(f"--threshold must be in (0, 1]; got {self.threshold}")
        if self.top_k < 1:
            raise ParameterError(f"--top-k must be at least 1; got {self.top_k}")
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
    work = out / f".work-{os.getpid()}"
    stages = _Stages(progress)
    counts: dict[str, object] = {}
    started = time.perf_counter()
    try:
        with stages("ingest"):
            source = open_events(events, spec)
        digest = _digest_in_background(source.report.files)
        in_parts = (options.parts or 0) > 1 or (
            options.parts is None and grouping_need(source) > parts.ONE_PART_SHARE * memory)
        built = (_build_in_parts if in_parts else _build_in_one_part)(source, options, memory, work, stages)
        report, plan = built.report, built.plan
        counts.update(events=report.rows_read, entities=len(built.keys), membership_rows=report.membership_rows,
                      empty_after_filter=report.empty_after_filter, null_rows_dropped=report.null_rows_dropped,
                      parts=len(built.store.ranges), representatives=built.representatives,
                      entities_in_identical_groups=int(len(built.keys) - built.representatives))

        if built.bucket_files is None:
            verified = pl.DataFrame(schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "jaccard": pl.Float64,
                                            "estimate": pl.Float64, "bands_shared": pl.Int32})
            counts.update(bucket_rows=0, candidate_pairs=0, verified_pairs=0)
            skew = None
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


@dataclass
class _Built:
    """What ingest, collapse, plan, sign and band leave for the join and later stages."""

    keys: pl.Series  # every entity key; entity id = position
    rep_of: np.ndarray
    representatives: int
    store: parts.PartStore | parts.HeldSets
    report: IngestReport
    plan: dict
    params: SignatureParams | None = None
    bucket_files: list[Path] | None = None  # None: no bands (identical sets only)
    shared_rows: int = 0
    bucket_rows: int = 0


def _build_in_one_part(source, options, memory, work, stages) -> _Built:
    with stages("ingest"):
        sets, report = membership_of(source, None)
    _check_entities(source, sets.size)
    with stages("collapse"):
        rep_of, reps = collapse_identical(sets)
    with stages("plan"):
        plan = _choose_plan(sets, options)
    _check_predicted(plan, options)
    built = _Built(sets.keys, rep_of, len(reps), parts.HeldSets(sets), report, plan)
    if plan["mode"] != "identical-only":
        built.params = SignatureParams(scheme=options.scheme, perms=plan["perms"], seed=options.seed)
        bands = _Bander(built.params, plan, memory, stages)
        with stages.progress.stage("sign and band", len(reps)) as task:
            bands.add(sets, reps, 0, task)
        built.bucket_files, built.shared_rows = bands.write(work / "buckets")
        built.bucket_rows = len(reps) * plan["bands"]
    return built


def _build_in_parts(source, options, memory, work, stages) -> _Built:
    """The run a key range at a time (:mod:`lshjob.parts`)."""
    with stages("count"):
        per_entity = parts.events_per_entity(source)
    _check_entities(source, per_entity.height)
    with stages("plan"):
        # Half a part: the planner's histogram adds an inverted index of the sample.
        budget_events = int(parts.part_budget(memory, per_entity.height) / 2 / parts.bytes_per_event(source))
        sample, _ = membership_of(source, parts.planning_sample(per_entity, budget_events))
        plan = _choose_plan(sample, options, total_entities=per_entity.height)
        del sample
    if plan["mode"] == "identical-only":
        raise ParameterError(
            f"{source.where}: threshold 1.0 (identical sets only) runs in one part; the sets need more than "
            f"half the memory budget of {memory / 2**30:.1f} GiB: raise --memory, or use a threshold below 1.0 "
            "(identical sets still pair up, through the bands)")
    _check_predicted(plan, options)
    params = SignatureParams(scheme=options.scheme, perms=plan["perms"], seed=options.seed)
    ranges = parts.key_ranges(per_entity, source, parts.part_budget(memory, per_entity.height),
                              options.parts)
    del per_entity
    store = parts.PartStore(work / "sets", source.text_hashes)
    report = IngestReport(files=source.report.files, rows_read=source.report.rows_read,
                          null_rows_dropped=source.report.null_rows_dropped)
    keys, rep_of, representatives = [], [], 0
    bands = _Bander(params, plan, memory, stages, spill=work / "keys")
    with stages.progress.stage("parts", len(ranges)) as task:
        for selection in ranges:
            with stages.part("ingest"):
                sets, part_report = membership_of(source, selection)
            report.add_part(part_report)
            first = store.ranges[-1][1] + 1 if store.ranges else 0
            with stages.part("collapse"):
                part_rep_of, reps = collapse_identical(sets)
            keys.append(sets.keys)
            rep_of.append(part_rep_of + first)
            representatives += len(reps)
            bands.add(sets, reps, first, None)
            with stages.part("ingest"):
                store.save(sets)
            del sets, part_rep_of, reps
            task.advance()
    if report.membership_rows == 0:
        raise InputError(f"{source.where}: no element is left after filtering (--min-count {source.min_count}); "
                         "nothing to sign")
    keys = pl.concat(keys)
    _check_entities(source, len(keys))
    files, shared = bands.write(work / "buckets")
    return _Built(keys, np.concatenate(rep_of), representatives, store, report, plan, params, files, shared,
                  representatives * plan["bands"])


def _check_entities(source, n: int) -> None:
    if n < 2:
        raise InputError(f"{source.where}: only {n} entity after ingest; a neighbour index needs at least 2")


def _check_predicted(plan: dict, options: RunOptions) -> None:
    predicted = plan.get("predicted", {})
    if predicted.get("expected_candidates", 0) > options.max_candidates:
        raise ParameterError(
            f"the plan (k={plan['perms']}, b={plan['bands']}, r={plan['rows']}) predicts "
            f"{predicted['expected_candidates']:.3g} candidate pairs at threshold {options.threshold}, "
            f"more than --max-candidates {options.max_candidates:.3g}; raise the threshold or --max-candidates"
        )


class _Bander:
    """Signs representatives a slice at a time and keeps only their bucket keys (8 bytes per
    band; in a file each under ``spill``, for a run in parts): a slice's signatures (raw and densified, laid out by position; polars reads them
    without a copy: at most 2 x 8k bytes a row) take at most an eighth of the budget. Then
    :meth:`write` writes the shared buckets' rows."""

    def __init__(self, params, plan, memory, stages, spill: Path | None = None) -> None:
        self.bands, self.rows = plan["bands"], plan["rows"]
        if params.scheme == "kperm":
            # Bands read only the first b*r positions; k-permutation positions are independent
            # (salts are a prefix of one sequence), so the rest is not computed here.
            params = SignatureParams(scheme="kperm", perms=self.bands * self.rows, seed=params.seed)
        self.params, self.memory, self.stages = params, memory, stages
        self.step = int(max(10_000, memory // 8 // (3 * 8 * params.perms + band.ROW_BYTES * self.bands)))
        self.slices: list[pl.DataFrame | Path] = []
        self.spill = spill  # keys saved here (a run in parts), else kept in memory

    def add(self, sets: Membership, reps: np.ndarray, first: int, task) -> None:
        """Sign and band ``reps`` (ids within ``sets``); entity ids in the keys are ``first + id``."""
        for lo in range(0, len(reps), self.step):
            ids = reps[lo:lo + self.step]
            with self.stages.part("sign"):
                columns = comparable_by_position(sets, ids, self.params)
            with self.stages.part("band"):
                keys = band.bucket_keys_by_position(columns, ids + first, self.bands, self.rows)
                if self.spill is not None:
                    self.spill.mkdir(parents=True, exist_ok=True)
                    keys = band.save_keys(keys, self.spill / f"keys-{len(self.slices):06d}.parquet")
                self.slices.append(keys)
            del columns
            if task is not None:
                task.advance(len(ids))

    def write(self, out_dir: Path) -> tuple[list[Path], int]:
        with self.stages.part("band"):
            files, written = band.write_shared_bucket_rows(self.slices, self.bands, out_dir,
                                                          batch_bytes=max(64 << 20, self.memory // 8))
        self.slices = []
        return files, written


def _choose_plan(sets: Membership, options: RunOptions, total_entities: int | None = None) -> dict:
    """The plan, from exact Jaccard of a sample of ``sets`` (all entities, or a uniform sample
    of ``total_entities``)."""
    if options.threshold >= 1.0:
        return {"mode": "identical-only", "why": "threshold 1.0: only identical sets qualify; "
                "they are grouped exactly, no signatures or bands are needed"}
    n_entities = total_entities or sets.size
    # Against a uniform sample of a fraction f of the entities, a sampled entity meets only
    # a fraction f of its similar pairs: 1/f times as many sampled entities see as many pairs.
    sample = min(sets.size, int(options.sample_size * n_entities / sets.size))
    hist = similarity.sample_histogram_from_sets(sets, sample, seed=0, total_entities=n_entities,
                                                 threshold=options.threshold)
    if options.bands is not None:
        perms = options.perms or 128
        chosen = _judge(options.threshold, hist, perms, options.bands, options.rows)
        why = f"given by --bands {options.bands} --rows {options.rows}"
        mode = "explicit"
    else:
        choices = (options.perms,) if options.perms else planner.DEFAULT_PERMS_CHOICES
        chosen = planner.data_plans(options.threshold, hist, choices, options.recall)[0].as_dict()
        why = (f"data mode: fewest expected candidates with expected recall >= {options.recall}; exact "
               f"Jaccard of {hist.sample_entities} sampled entities against "
               f"{'all' if hist.design == 'against_all' else 'each other'} ({n_entities} entities"
               + (f"; pairs scaled from a uniform sample of {sets.size}" if n_entities != sets.size else "") + ")")
        mode = "data"
    return {
        "mode": mode,
        "why": why,
        "perms": chosen["perms"],
        "bands": chosen["bands"],
        "rows": chosen["rows"],
        "predicted": chosen,
        "sample": {"entities": hist.sample_entities, "design": hist.design,
                   "identical_pairs": hist.identical_pairs,
                   "pairs_at_or_above_threshold": hist.pairs_at_or_above(options.threshold)},
    }


def _judge(threshold, hist, perms, bands, rows) -> dict:
    plans = planner.data_plans(threshold, hist, (perms,), recall=1e-9)
    for p in plans:
        if p.bands == bands and p.rows == rows:
            return p.as_dict()
    raise AssertionError("explicit plan missing from the enumeration")


def _inputs(events, report, digest: tuple[int, str]) -> dict:
    sizes, sha256 = digest
    return {"source": str(events), "files": report.files, "bytes": sizes, "rows": report.rows_read,
            "sha256": sha256}


def _digest_in_background(files: list[str]) -> Future:
    """(bytes, sha256) of the input files, computed in a thread while the run works (hashlib
    releases the GIL on large blocks): 0.3 s of serial time at 1M entities otherwise."""
    def digest() -> tuple[int, str]:
        h = hashlib.sha256()
        sizes = 0
        for name in files:
            h.update(name.encode() + b"\0")
            with open(name, "rb") as fh:
                while block := fh.read(1 << 22):
                    h.update(block)
                    sizes += len(block)
        return sizes, h.hexdigest()

    pool = ThreadPoolExecutor(max_workers=1)
    future = pool.submit(digest)
    pool.shutdown(wait=False)
    return future


def _versions() -> dict:
    import duckdb
    import numba

    return {"lshjob": __version__, "python": platform.python_version(), "polars": pl.__version__,
            "numpy": np.__version__, "duckdb": duckdb.__version__, "numba": numba.__version__}
