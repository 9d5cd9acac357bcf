"""File-level Python API: what each CLI command calls. Tests call these directly."""

from __future__ import annotations

import time
from pathlib import Path

import polars as pl

from .errors import ParameterError
from .ingest import EventSpec, load_sets
from .progress import QUIET, StageProgress
from .signatures import (
    SignatureParams,
    merge_signatures,
    read_signatures,
    sign_sets,
    signature_metadata,
    write_signatures,
)


def sign_file(
    events: str | Path,
    out: str | Path,
    spec: EventSpec,
    params: SignatureParams = SignatureParams(),
    progress: StageProgress = QUIET,
) -> dict:
    """Ingest ``events``, sign every (entity[, segment][, period]) set, write ``out``.

    Returns a summary: counts from ingest, the signature parameters and timings.
    Nothing is written when the input is rejected.
    """
    started = time.perf_counter()
    with progress.stage("ingest"):
        sets, report = load_sets(events, spec)
    ingested = time.perf_counter()
    with progress.stage("sign"):
        table = sign_sets(sets, spec.key_columns, params)
    signed = time.perf_counter()
    meta = signature_metadata(params, spec.key_columns, period_unit=spec.period)
    write_signatures(table, out, meta)
    return {
        "out": str(out),
        "signatures": table.height,
        "scheme": params.scheme,
        "k": params.perms,
        "seed": params.seed,
        "ingest": report.as_dict(),
        "seconds": {
            "ingest": round(ingested - started, 3),
            "sign": round(signed - ingested, 3),
            "total": round(time.perf_counter() - started, 3),
        },
    }


def merge_files(
    sources: list[str | Path],
    out: str | Path,
    keep: list[str] | None = None,
    since: str | None = None,
    until: str | None = None,
) -> dict:
    """Fold signature files: rows sharing the ``keep`` columns become one (element-wise min).

    ``keep`` defaults to ``["entity"]`` (all segments and periods of an entity together).
    ``since``/``until`` (ISO dates, inclusive) keep only periods in that window first.
    """
    keep = list(keep or ["entity"])
    if "entity" not in keep:
        raise ParameterError(f"--keep must include 'entity'; got {', '.join(keep)}")
    tables = [read_signatures(s) for s in sources]
    if since is not None or until is not None:
        tables = [(_window(t, m, since, until), m) for t, m in tables]
    merged, meta = merge_signatures(tables, keep)
    write_signatures(merged, out, meta)
    return {
        "out": str(out),
        "inputs": [str(s) for s in sources],
        "rows_in": sum(t.height for t, _ in tables),
        "rows_out": merged.height,
        "keep": keep,
    }


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
