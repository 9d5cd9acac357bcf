"""File-level Python API: what each CLI command calls. Tests call these directly."""

from __future__ import annotations

import time
from pathlib import Path

import polars as pl

from . import event_signing, keyed
from .errors import InputError, ParameterError
from . import parts as parts_module
from .ingest import EventSpec, IngestReport, validated_events
from .ingest import group_events as group_sets
from .loading import group_events, membership_of, open_events
from .outputs import refuse_output_over_inputs
from .resources import default_memory, peak_bytes
from .streaming import timed, write_streamed
from .progress import QUIET, StageProgress
from .signatures import (
    SignatureParams,
    check_compatible,
    merge_signatures,
    merged_meta,
    signature_meta,
    sign_sets_slices,
    signature_slices,
    signature_metadata,
    write_signatures,
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
    refuse_output_over_inputs(out, [events])
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
                if len(grouped.keys) == 0:  # every row dropped (null keys): as membership_of and the run
                    raise InputError(f"{source.where}: no element is left after filtering (--min-count "
                                     f"{spec.min_count}); nothing to sign")
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


def merge_files(
    sources: list[str | Path],
    out: str | Path,
    keep: list[str] | None = None,
    since: str | None = None,
    until: str | None = None,
    memory: int | None = None,
    parts: int | None = None,
) -> dict:
    """Fold signature files: rows sharing the ``keep`` columns become one (element-wise min).

    ``keep`` defaults to ``["entity"]`` (all segments and periods of an entity together).
    ``since``/``until`` (ISO dates, inclusive) keep only periods in that window first.
    When the rows need more than half of ``memory`` (bytes; default half the machine), or
    ``parts`` > 1, they are merged an entity key range at a time (the files are sorted by
    entity, so a range's read skips most of them), each range's rows streamed into ``out``
    as they are merged.
    """
    refuse_output_over_inputs(out, sources)
    keep = list(keep or ["entity"])
    if "entity" not in keep:
        raise ParameterError(f"--keep must include 'entity'; got {', '.join(keep)}")
    metas = [signature_meta(s) for s in sources]
    rows_in = sum(pl.scan_parquet(s).select(pl.len()).collect().item() for s in sources)
    per_row = MERGE_COPIES * (8 * metas[0]["k"] + parts_module.SIGNATURE_BYTES_PER_ENTITY)
    memory = memory or default_memory()
    if parts == 1 or (parts is None and rows_in * per_row <= parts_module.ONE_PART_SHARE * memory):
        tables = [(pl.read_parquet(s), m) for s, m in zip(sources, metas)]
        if since is not None or until is not None:
            tables = [(_window(t, m, since, until), m) for t, m in tables]
        merged, meta = merge_signatures(tables, keep)
        write_signatures(merged, out, meta)
        return _merge_summary(out, sources, sum(t.height for t, _ in tables), merged.height, keep, 1)
    if parts is None:
        parts_module.require_copy_budget(memory, f"{sources[0]} (and the other inputs): the rows", "merging")
    counts = (pl.concat([pl.scan_parquet(s).select("entity") for s in sources]).group_by("entity")
              .agg(pl.len().alias("events")).collect(engine="streaming").sort("entity"))
    ranges = parts_module.key_ranges(counts, None, parts_module.part_budget(memory, counts.height, 0.75), parts,
                                     event_bytes=per_row)
    seen = [0]

    def tables():
        for selection in ranges:
            read = [(pl.scan_parquet(s).filter(selection.condition).collect(), m) for s, m in zip(sources, metas)]
            if since is not None or until is not None:
                read = [(_window(t, m, since, until), m) for t, m in read]
            seen[0] += sum(t.height for t, _ in read)
            merged = merge_signatures(read, keep)[0]
            del read  # not held while the writer takes the merged rows
            yield merged
            del merged

    for meta in metas[1:]:
        check_compatible(metas[0], meta)  # before any range is read
    written = write_streamed(tables(), out, merged_meta(metas[0], keep))
    return _merge_summary(out, sources, seen[0], written, keep, len(ranges))


MERGE_COPIES = 4  # rows read (with decode buffers), the merged matrix and its column, writing: 3.1x measured
# in one part with every key distinct (2M rows, 6.3 GiB), 2.7x with every key twice; under --memory 1GiB
# the peaks were 1.10 and 0.99 GiB


def _merge_summary(out, sources, rows_in, rows_out, keep, n_parts) -> dict:
    return {"out": str(out), "inputs": [str(s) for s in sources], "rows_in": rows_in, "rows_out": rows_out,
            "keep": keep, "parts": n_parts, "peak_memory_bytes": peak_bytes()}


def _window(table: pl.DataFrame, meta: dict, since: str | None, until: str | None) -> pl.DataFrame:
    if "period" not in table.columns:
        raise ParameterError(
            f"{meta['path']}: --since/--until need a 'period' column; this file was signed without --period"
        )
    cond = pl.lit(True)
    for bound, op in ((since, "ge"), (until, "le")):
        if bound is None:
            continue
        try:
            day = pl.Series([bound]).str.to_date(strict=True)[0]
        except Exception as exc:
            raise ParameterError(f"--since/--until must be ISO dates like 2026-03-01; got {bound!r}") from exc
        cond = cond & getattr(pl.col("period"), op)(day)
    return table.filter(cond)


from .api_plan import PlanResult, plan_banding  # noqa: E402,F401  (the API of lshjob plan)
