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
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import polars as pl

from . import __version__, planner, similarity
from . import band
from .errors import InputError, ParameterError
from .identical import collapse_identical
from .ingest import EventSpec
from .join import DEFAULT_MAX_BUCKET, JoinSettings, candidate_pairs
from .loading import load_membership
from .membership import Membership
from .progress import QUIET, StageProgress
from .publish import neighbour_table, publish_index
from .resources import current_bytes, default_memory, parse_size, peak_bytes, reset_peak
from .signatures import SignatureParams, comparable_by_position
from .verify import add_estimates, verify_pairs

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
        SignatureParams(scheme=self.scheme)


class _Stages:
    """Timings, peak memory and counts per stage."""

    def __init__(self, progress: StageProgress) -> None:
        self.progress = progress
        self.seconds: dict[str, float] = {}
        self.peak: dict[str, int] = {}

    def __call__(self, name: str, total: int = 1):
        stages = self

        class _Ctx:
            def __enter__(self):
                reset_peak()
                self.start = time.perf_counter()
                self.task = stages.progress.stage(name, total)
                return self.task.__enter__()

            def __exit__(self, *exc):
                self.task.__exit__(*exc)
                stages.seconds[name] = round(time.perf_counter() - self.start, 3)
                stages.peak[name] = peak_bytes()

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
            sets, report = load_membership(events, spec, memory)
        if sets.size < 2:
            raise InputError(f"{events}: only {sets.size} entity after ingest; a neighbour index needs at least 2")
        counts.update(events=report.rows_read, entities=sets.size, membership_rows=report.membership_rows,
                      empty_after_filter=report.empty_after_filter, null_rows_dropped=report.null_rows_dropped)

        with stages("collapse"):
            rep_of, reps = collapse_identical(sets)
        counts.update(representatives=len(reps), entities_in_identical_groups=int(sets.size - len(reps)))

        with stages("plan"):
            plan = _choose_plan(sets, options)
        predicted = plan.get("predicted", {})
        if predicted.get("expected_candidates", 0) > options.max_candidates:
            raise ParameterError(
                f"the plan (k={plan['perms']}, b={plan['bands']}, r={plan['rows']}) predicts "
                f"{predicted['expected_candidates']:.3g} candidate pairs at threshold {options.threshold}, "
                f"more than --max-candidates {options.max_candidates:.3g}; raise the threshold or --max-candidates"
            )

        if plan["mode"] == "identical-only":
            verified = pl.DataFrame(schema={"left_rep": pl.Int64, "right_rep": pl.Int64, "jaccard": pl.Float64,
                                            "estimate": pl.Float64, "bands_shared": pl.Int32})
            counts.update(bucket_rows=0, candidate_pairs=0, verified_pairs=0)
            skew = None
        else:
            params = SignatureParams(scheme=options.scheme, perms=plan["perms"], seed=options.seed)
            files, shared_rows, n_bucket_rows = _sign_and_band(sets, reps, params, plan, work / "buckets",
                                                               memory, stages)
            counts["bucket_rows"] = n_bucket_rows
            counts["shared_bucket_rows"] = shared_rows

            with stages("join"):
                # DuckDB gets what the budget leaves beside the sets and signatures held here.
                duck = max(memory - current_bytes(), memory // 4, 128 * 2**20)
                settings = JoinSettings(memory_limit=f"{duck // 2**20}MiB",
                                        temp_directory=str(work / "spill"), max_bucket=options.max_bucket)
                joined = candidate_pairs(files, work / "candidates.parquet", settings, plan["bands"], n_bucket_rows)
            skew = joined["skew"]
            counts["candidate_pairs"] = joined["candidate_pairs"]

            with stages("verify"):
                verified = _verify_in_chunks(work / "candidates.parquet", joined["candidate_pairs"], sets,
                                             options.threshold, memory)
                verified = add_estimates(verified, sets, params)
            counts["verified_pairs"] = verified.height

        with stages("publish"):
            table = neighbour_table(verified, rep_of, sets.keys, options.top_k, plan.get("bands", 0))
        counts["published_rows"] = table.height
        manifest = {
            "format": "lshjob-index",
            "format_version": 1,
            "inputs": _inputs(events, report),
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


VERIFY_BYTES_PER_PAIR = 64  # candidate row in polars and numpy, plus the float results
MIN_VERIFY_SLICE = 1_000_000


def _sign_and_band(sets, reps, params, plan, out_dir, memory, stages) -> tuple[list[Path], int, int]:
    """Sign the representatives a slice at a time and keep only their bucket keys (8 bytes
    per band): a slice's signatures (raw and densified, laid out by position; polars reads them without a copy: at most 2 x 8k bytes a
    row) take at most an eighth of the budget. Then write the shared buckets' rows.
    Returns (files, rows written, all bucket rows)."""
    bands, rows = plan["bands"], plan["rows"]
    if params.scheme == "kperm":
        # Bands read only the first b*r positions; k-permutation positions are independent
        # (salts are a prefix of one sequence), so the rest is not computed here.
        params = SignatureParams(scheme="kperm", perms=bands * rows, seed=params.seed)
    per_row = 3 * 8 * params.perms + band.ROW_BYTES * bands
    step = int(max(10_000, memory // 8 // per_row))
    slices = []
    with stages.progress.stage("sign and band", len(reps)) as task:
        for lo in range(0, len(reps), step):
            ids = reps[lo:lo + step]
            with stages.part("sign"):
                columns = comparable_by_position(sets, ids, params)
            with stages.part("band"):
                slices.append(band.bucket_keys_by_position(columns, ids, bands, rows))
            del columns
            task.advance(len(ids))
    with stages.part("band"):
        files, written = band.write_shared_bucket_rows(slices, bands, out_dir, batch_bytes=max(64 << 20, memory // 8))
    return files, written, len(reps) * bands


def _verify_in_chunks(path, n_pairs, sets, threshold, memory) -> pl.DataFrame:
    """Verify candidates a slice at a time so memory stays bounded whatever their number;
    a slice is sized to a quarter of the budget."""
    step = max(MIN_VERIFY_SLICE, memory // 4 // VERIFY_BYTES_PER_PAIR)
    parts = []
    for offset in range(0, max(n_pairs, 1), step):
        chunk = pl.scan_parquet(path).slice(offset, step).collect()
        parts.append(verify_pairs(chunk, sets, threshold))
    return pl.concat(parts)


def _choose_plan(sets: Membership, options: RunOptions) -> dict:
    if options.threshold >= 1.0:
        return {"mode": "identical-only", "why": "threshold 1.0: only identical sets qualify; "
                "they are grouped exactly, no signatures or bands are needed"}
    n_entities = sets.size
    hist = similarity.sample_histogram_from_sets(sets, options.sample_size, seed=0, threshold=options.threshold)
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
               f"{'all' if hist.design == 'against_all' else 'each other'} ({n_entities} entities)")
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


def _inputs(events, report) -> dict:
    digest = hashlib.sha256()
    sizes = 0
    for name in report.files:
        digest.update(name.encode() + b"\0")
        with open(name, "rb") as fh:
            while block := fh.read(1 << 22):
                digest.update(block)
                sizes += len(block)
    return {"source": str(events), "files": report.files, "bytes": sizes, "rows": report.rows_read,
            "sha256": digest.hexdigest()}


def _versions() -> dict:
    import duckdb
    import numba

    return {"lshjob": __version__, "python": platform.python_version(), "polars": pl.__version__,
            "numpy": np.__version__, "duckdb": duckdb.__version__, "numba": numba.__version__}
