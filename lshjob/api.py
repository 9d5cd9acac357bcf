"""File-level Python API: what each CLI command calls. Tests call these directly."""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import polars as pl

from . import event_signing, keyed, planner, similarity
from .errors import InputError, ParameterError
from . import parts as parts_module
from .ingest import EventSpec, IngestReport, load_sets, validated_events
from .ingest import group_events as group_sets
from .loading import group_events, load_membership, membership_of, open_events
from .merging import merge_files  # noqa: F401  (the API of lshjob merge)
from .resources import default_memory, peak_bytes
from .streaming import timed, write_streamed
from .planner import PairHistogram
from .progress import QUIET, StageProgress
from .signatures import (
    SignatureParams,
    params_from_metadata,
    read_signatures,
    sign_sets_slices,
    signature_slices,
    signature_metadata,
)


def sign_file(
    events: str | Path,
    out: str | Path,
    spec: EventSpec,
    params: SignatureParams = SignatureParams(),
    progress: StageProgress = QUIET,
    memory: int | None = None,
    parts: int | None = None,
) -> dict:
    """Ingest ``events``, sign every (entity[, segment][, period]) set, write ``out``.

    Sets are signed and written a slice at a time, so the signatures (8k bytes a set at
    k=128) are never all held. Sets that need more than half of ``memory`` (bytes; default
    half the machine) to group, or ``parts`` > 1, are also read and grouped an entity key
    range at a time (:mod:`lshjob.parts`), by the streaming loader (8 to 36 bytes an event;
    segments and periods by composite keys, :mod:`lshjob.keyed`) or, for segments or periods
    of text entity keys, by polars (about 230). The signatures are the same either way.
    Returns a summary: counts from ingest, the signature parameters and timings. Nothing is
    written when the input is rejected.
    """
    started = time.perf_counter()
    memory = memory or default_memory()
    meta = signature_metadata(params, spec.key_columns, period_unit=spec.period)
    ranges, source, codec = None, None, None
    direct = spec.count is None and spec.min_count <= 1  # signed from grouped events: no sorted sets built
    with progress.stage("ingest"):
        if spec.key_columns == ["entity"]:  # streaming loader: no group-by over (entity, element)
            source = open_events(events, spec)
        else:  # integer entities: one composite key per set, the same loader (lshjob.keyed)
            frame, report, where = validated_events(events, spec)
            source, codec = keyed.keyed_source(frame, report, where, spec) or (None, None)
        if source is not None:
            ranges = parts_module.signing_ranges(source, params.perms, memory, parts)
            if ranges is None and direct:
                grouped = group_events(source, None)
            elif ranges is None:
                members, report = membership_of(source, None)
        else:
            ranges = parts_module.keyed_signing_ranges(frame, report.rows_read - report.null_rows_dropped, where,
                                                       params.perms, memory, parts)
            if ranges is None:
                sets = group_sets(frame, spec, where, report)
    keyed_by = codec.decode_tables if codec is not None else iter  # slices keyed by the spec's columns
    if ranges is not None and source is not None:
        return _sign_in_parts(ranges, _entity_part(source, direct, params, keyed_by), source.report, source.where,
                              spec, out, params, meta, progress, started)
    if ranges is not None:
        return _sign_in_parts(ranges, _keyed_part(frame, spec, where, params), report, where, spec, out, params,
                              meta, progress, started)
    ingested = time.perf_counter()
    if source is not None and direct:
        made, n, report = (keyed_by(event_signing.sign_grouped_slices(grouped, params, event_signing.SLICE_ROWS)),
                           len(grouped.keys), grouped.report)
    elif source is not None:
        made, n = keyed_by(signature_slices(members, params, event_signing.SLICE_ROWS)), members.size
    else:
        made, n = sign_sets_slices(sets, spec.key_columns, params, event_signing.SLICE_ROWS), report.sets
    return _sign_streamed(made, n, report, out, params, meta, progress, started, ingested)


def _sign_streamed(made, n, report, out, params, meta, progress, started, ingested) -> dict:
    """Write the signature slices ``made`` (an iterator over the ``n`` sets' signatures) while
    they are made: the writer encodes one slice while the next is signed, the signatures are
    never all held, and there is no 1 GB matrix to fault in per million entities. The file is
    the one writing at once gives."""
    seconds = {"sign": 0.0}

    def slices():
        with progress.stage("sign", -(-n // event_signing.SLICE_ROWS)) as task:
            for table in timed(made, seconds, "sign"):
                yield table
                task.advance()

    rows = write_streamed(slices(), out, meta)
    signed = ingested + seconds["sign"]
    return _sign_summary(out, rows, params, report, 1, started, ingested, signed, time.perf_counter())


def _sign_in_parts(ranges, sign_part, files_report, where, spec, out, params, meta, progress, started) -> dict:
    """Sign and write the sets a key range at a time: ``sign_part(selection)`` groups the
    range's events and returns its signature slices and its ingest report (complete once the
    slices are made); each slice goes to the writer as it is made."""
    report = IngestReport(files=files_report.files, rows_read=files_report.rows_read,
                          null_rows_dropped=files_report.null_rows_dropped)
    seconds = {"ingest": time.perf_counter() - started, "sign": 0.0}

    def tables():
        with progress.stage("sign", len(ranges)) as task:
            for selection in ranges:
                t0 = time.perf_counter()
                made, part = sign_part(selection)
                seconds["ingest"] += time.perf_counter() - t0
                yield from timed(made, seconds, "sign")  # a slice at a time, as in one part
                report.add_part(part)
                del made
                task.advance()
        if report.sets == 0:
            raise InputError(f"{where}: no element is left after filtering (--min-count {spec.min_count}); "
                             "nothing to sign")

    rows = write_streamed(tables(), out, meta)
    ingested = started + seconds["ingest"]
    signed = ingested + seconds["sign"]
    return _sign_summary(out, rows, params, report, len(ranges), started, ingested, signed, time.perf_counter())


def _entity_part(source, direct, params, keyed_by):  # the streaming loader, as in one part
    def sign_part(selection):
        if direct:
            grouped = group_events(source, selection)
            return keyed_by(event_signing.sign_grouped_slices(grouped, params, event_signing.SLICE_ROWS)), grouped.report
        members, part = membership_of(source, selection)
        return keyed_by(signature_slices(members, params, event_signing.SLICE_ROWS)), part
    return sign_part


def _keyed_part(frame, spec, where, params):
    """Segments or periods: polars groups the range's events (a range may have no set left
    after ``--min-count``; only all of them empty is an error)."""
    def sign_part(selection):
        part = IngestReport(files=[], rows_read=selection.events)
        sets = group_sets(frame.filter(selection.condition), spec, where, part, allow_empty=True)
        if sets.height == 0:
            return iter(()), part
        return sign_sets_slices(sets, spec.key_columns, params, event_signing.SLICE_ROWS), part
    return sign_part


def _sign_summary(out, n, params, report, n_parts, started, ingested, signed, written) -> dict:
    return {
        "out": str(out),
        "signatures": n,
        "scheme": params.scheme,
        "k": params.perms,
        "seed": params.seed,
        "parts": n_parts,
        "peak_memory_bytes": peak_bytes(),
        "ingest": report.as_dict(),
        "seconds": {
            "ingest": round(ingested - started, 3),
            "sign": round(signed - ingested, 3),
            "write": round(written - signed, 3),
            "total": round(written - started, 3),
        },
    }


@dataclass
class PlanResult:
    """What ``lshjob plan`` decided and why."""

    mode: str
    threshold: float
    perms: int
    bands: int
    rows: int
    chosen: dict
    runners_up: list[dict]
    sample: dict | None = None
    histogram: PairHistogram | None = None

    def as_dict(self) -> dict:
        return {
            "mode": self.mode,
            "threshold": self.threshold,
            "perms": self.perms,
            "bands": self.bands,
            "rows": self.rows,
            "chosen": self.chosen,
            "runners_up": self.runners_up,
            "sample": self.sample,
        }


def plan_banding(
    threshold: float,
    perms: int | None = None,
    recall: float = 0.95,
    sample: str | Path | None = None,
    spec: EventSpec | None = None,
    sample_size: int = 2000,
    entities: int | None = None,
    fp_weight: float = 0.5,
    fn_weight: float = 0.5,
    seed: int = 0,
    runners_up: int = 5,
    bands: int | None = None,
    rows: int | None = None,
) -> PlanResult:
    """Choose (k, b, r). Without ``sample``: theory mode (weighted FP/FN areas, k default 128).
    With ``sample`` (a signature file, or events read with ``spec``): data mode, the plan that
    meets ``recall`` with the fewest expected candidate pairs, scaled to ``entities``
    (default: the entity count of the sample file). With ``bands`` and ``rows`` that plan is
    judged instead of chosen; the runners-up are then the recommended plans."""
    planner.validate(threshold, perms, fp_weight, fn_weight)
    if (bands is None) != (rows is None):
        raise ParameterError("--bands and --rows go together; give both or neither")
    explicit = (bands, rows) if bands is not None else None
    if sample_size < 2:
        raise ParameterError(f"--sample-size must be at least 2; got {sample_size}")
    if entities is not None and entities < 2:
        raise ParameterError(f"--entities must be at least 2; got {entities}")
    if sample is None:
        k = perms or 128
        if explicit:
            planner.check_explicit(k, *explicit)
        ranked = planner.theory_plans(threshold, k, fp_weight, fn_weight)
        best = next(p for p in ranked if (p.bands, p.rows) == explicit) if explicit else ranked[0]
        others = [_banding_dict(p, threshold) for p in ranked if p is not best][:runners_up]
        return PlanResult("theory", threshold, best.perms, best.bands, best.rows,
                          _banding_dict(best, threshold), others)
    if _is_signature_file(sample):
        table, meta = read_signatures(sample)
        if table.height < 2:
            raise InputError(f"{sample}: the sample needs at least 2 signature rows; got {table.height}")
        if perms is not None and perms > meta["k"]:
            raise ParameterError(f"--perms {perms} exceeds the signature length k={meta['k']} of {sample}")
        hist = similarity.sample_histogram_from_signatures(
            table, params_from_metadata(meta), sample_size, seed, entities, threshold
        )
        basis = "signature estimates"
        choices = (perms or meta["k"],)
    else:
        if spec is None:
            raise ParameterError(
                f"{sample}: is not a signature file; to plan from events give --entity and --element"
            )
        if spec.key_columns == ["entity"]:  # the streaming loader: 8-20 bytes an event, not ~100
            sets = load_membership(sample, spec)[0]
            n_entities = sets.size
        else:
            sets = load_sets(sample, spec)[0]
            n_entities = sets["entity"].n_unique()
        if n_entities < 2:
            raise InputError(f"{sample}: the sample needs at least 2 entities; got {n_entities}")
        hist = similarity.sample_histogram_from_sets(sets, sample_size, seed, entities, threshold)
        basis = "exact Jaccard"
        choices = (perms,) if perms is not None else planner.DEFAULT_PERMS_CHOICES
    if explicit:
        planner.check_explicit(choices[0] if len(choices) == 1 else 128, *explicit)
        k = choices[0] if len(choices) == 1 else 128
        best = next(p for p in planner.data_plans(threshold, hist, (k,), 1e-12)
                    if (p.bands, p.rows) == explicit)
        best.meets_target = best.expected_recall >= recall
        try:
            ranked = [best, *planner.data_plans(threshold, hist, choices, recall)]
        except ParameterError:
            ranked = [best]
    else:
        ranked = planner.data_plans(threshold, hist, choices, recall)
        best = ranked[0]
    info = {
        "path": str(sample),
        "similarity": basis,
        "sampled_entities": hist.sample_entities,
        "total_entities": hist.total_entities,
        "design": hist.design,
        "sampled_pairs": int(hist.counts.sum() + hist.identical_pairs),
        "sampled_identical_pairs": int(hist.identical_pairs),
        "expected_identical_pairs": hist.identical_pairs * hist.scale,
        "sampled_pairs_at_or_above_threshold": int(hist.pairs_at_or_above(threshold)),
        "recall_target": recall,
    }
    return PlanResult(
        "data", threshold, best.perms, best.bands, best.rows,
        best.as_dict(), [p.as_dict() for p in ranked[1 : runners_up + 1]], info, hist,
    )


def _banding_dict(p: planner.Banding, threshold: float) -> dict:
    return {
        "perms": p.perms,
        "bands": p.bands,
        "rows": p.rows,
        "false_positive_area": p.false_positive,
        "false_negative_area": p.false_negative,
        "weighted_error": p.weighted_error,
        "approximate_threshold": p.approximate_threshold,
        "probability_at_threshold": float(planner.candidate_probability(threshold, p.bands, p.rows)),
    }


def _is_signature_file(path: str | Path) -> bool:
    path = Path(path)
    if not path.is_file() or path.suffix.lower() not in (".parquet", ".pq"):
        return False
    try:
        return "lshjob" in pl.read_parquet_metadata(path)
    except Exception:
        return False
