"""File-level Python API: what each CLI command calls. Tests call these directly."""

from __future__ import annotations

import time
from pathlib import Path

from lshjob.core import slicing
from lshjob.errors import InputError
from lshjob.ingest import keyed
from lshjob.ingest.loading import membership_of, open_events, read_and_group
from lshjob.ingest.spec import EventSpec, IngestReport, validated_events
from lshjob.ingest.spec import group_set_rows as group_sets
from lshjob.jobs import parts as parts_module
from lshjob.jobs.merge import merge_files  # noqa: F401  (the API of lshjob merge)
from lshjob.runtime.budget import default_memory, peak_bytes
from lshjob.runtime.outputs import output_file
from lshjob.runtime.progress import QUIET, StageProgress
from lshjob.sign.signatures import SignatureParams, signature_metadata
from lshjob.sign.slices import SetRows, sign_slices
from lshjob.sign.streaming import timed, write_streamed

DEFAULT_PARAMS = SignatureParams()  # frozen, so one shared default is safe


def sign_file(
    events: str | Path,
    out: str | Path,
    spec: EventSpec,
    params: SignatureParams = DEFAULT_PARAMS,
    progress: StageProgress = QUIET,
    memory: int | None = None,
    parts: int | None = None,
) -> dict:
    """Ingest ``events``, sign every (entity[, segment][, period]) set, write ``out``.

    Sets are signed and written a slice at a time, so the signatures (8k bytes a set at
    k=128) are never all held. Sets that need more than half of ``memory`` (bytes; default
    half the machine) to group, or ``parts`` > 1, are also read and grouped an entity key
    range at a time (:mod:`lshjob.jobs.parts`), by the streaming loader (8 to 36 bytes an event;
    segments and periods by composite keys, :mod:`lshjob.ingest.keyed`) or, for segments or periods
    of text entity keys, by polars (about 230). The signatures are the same either way.
    Returns a summary: counts from ingest, the signature parameters and timings. Nothing is
    written when the input is rejected.
    """
    out = output_file(out, [events], "sign")  # a symbolic link: the file it leads to
    started = time.perf_counter()
    memory = memory or default_memory()
    meta = signature_metadata(params, spec.key_columns, period_unit=spec.period)
    ranges, source, codec = None, None, None
    direct = spec.count is None and spec.min_count <= 1  # signed from grouped events: no sorted sets built
    with progress.stage("ingest"):
        if spec.key_columns == ["entity"]:  # streaming loader: no group-by over (entity, element)
            source = open_events(events, spec)
        else:  # integer entities: one composite key per set, the same loader (lshjob.ingest.keyed)
            frame, report, where = validated_events(events, spec)
            source, codec = keyed.keyed_source(frame, report, where, spec) or (None, None)
        if source is not None:
            ranges = parts_module.signing_ranges(source, params.perms, memory, parts)
            if ranges is None and direct:
                grouped = read_and_group(source, None)
                if len(grouped.keys) == 0:  # every row dropped (null keys): as membership_of and the run
                    raise InputError(f"{source.where}: no element is left after filtering (--min-count "
                                     f"{spec.min_count}); nothing to sign")
            elif ranges is None:
                members, report = membership_of(source, None)
        else:
            with report.reading(where):  # a file failing to read is named
                ranges = parts_module.keyed_signing_ranges(frame, report.rows_read - report.null_rows_dropped,
                                                           where, params.perms, memory, parts)
            if ranges is None:
                sets = group_sets(frame, spec, where, report)
    keyed_by = codec.decode_tables if codec is not None else iter  # slices keyed by the spec's columns
    if ranges is not None and source is not None:
        return _sign_in_parts(ranges, _entity_part(source, direct, params, keyed_by), source.report, source.where,
                              spec, out, params, meta, progress, started)
    if ranges is not None:
        return _sign_in_parts(ranges, _keyed_part(frame, spec, where, params, report), report, where, spec, out, params,
                              meta, progress, started)
    ingested = time.perf_counter()
    if source is not None and direct:
        made, n, report = (keyed_by(sign_slices(grouped, params)),
                           len(grouped.keys), grouped.report)
    elif source is not None:
        made, n = keyed_by(sign_slices(members, params)), members.size
    else:
        made, n = sign_slices(SetRows(sets, spec.key_columns), params), report.sets
    return _sign_streamed(made, n, report, out, params, meta, progress, started, ingested)


def _sign_streamed(made, n, report, out, params, meta, progress, started, ingested) -> dict:
    """Write the signature slices ``made`` (an iterator over the ``n`` sets' signatures) while
    they are made: the writer encodes one slice while the next is signed, the signatures are
    never all held, and there is no 1 GB matrix to fault in per million entities. The file is
    the one writing at once gives."""
    seconds = {"sign": 0.0}

    def counted():
        with progress.stage("sign", -(-n // slicing.SLICE_ROWS)) as task:
            for table in timed(made, seconds, "sign"):
                yield table
                task.advance()

    rows = write_streamed(counted(), out, meta)
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
            grouped = read_and_group(source, selection)
            return keyed_by(sign_slices(grouped, params)), grouped.report
        members, part = membership_of(source, selection)
        return keyed_by(sign_slices(members, params)), part
    return sign_part


def _keyed_part(frame, spec, where, params, report):
    """Segments or periods: polars groups the range's events (a range may have no set left
    after ``--min-count``; only all of them empty is an error)."""
    def sign_part(selection):
        part = IngestReport(files=report.files, columns=report.columns, rows_read=selection.events)
        sets = group_sets(frame.filter(selection.condition), spec, where, part, allow_empty=True)
        if sets.height == 0:
            return iter(()), part
        return sign_slices(SetRows(sets, spec.key_columns), params), part
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


from lshjob.jobs.plan import plan_banding, plan_summary  # noqa: E402,F401  (the API of lshjob plan)
