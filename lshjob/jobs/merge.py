"""``lshjob merge``: fold signature files by their key columns, optionally within a window of
periods, in one part or an entity key range at a time.

Everything that can be known before reading the signatures is checked first: the window's
dates, the files' metadata (scheme, k, seed), that every file has the kept key columns (and
``period`` when a window is given) with types that agree, and that the selection holds at
least one row. So a bad option or an empty selection stops with one line and nothing written.
An input file without rows (or without rows in the window) is simply folded: it adds nothing.
"""

from __future__ import annotations

import datetime as dt
import glob
from pathlib import Path

import polars as pl

from lshjob.errors import InputError, ParameterError
from lshjob.runtime import budget
from lshjob.runtime.budget import Budget, default_memory, peak_bytes
from lshjob.runtime.outputs import PATTERN_CHARS, output_file
from lshjob.runtime.partitions import key_ranges
from lshjob.sign.signatures import check_compatible, merge_signatures, merged_meta, signature_meta, write_signatures
from lshjob.sign.streaming import write_streamed


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
    ``since``/``until`` (ISO dates, inclusive) keep only periods in that window first; a
    window that selects no row is refused, naming the periods the files hold.
    When the rows need more than half of ``memory`` (bytes; default half the machine), or
    ``parts`` > 1, they are merged an entity key range at a time (the files are sorted by
    entity, so a range's read skips most of them), each range's rows streamed into ``out``
    as they are merged.
    """
    given, sources = list(sources), signature_files(sources)
    out = output_file(out, given + sources, "merge")  # a symbolic link: the file it leads to
    keep = [c for c in dict.fromkeys(keep or ["entity"]) if c]  # "entity,,entity" is "entity"
    if "entity" not in keep:
        raise ParameterError(f"--keep must include 'entity'; got {', '.join(keep)}")
    if not sources:
        raise ParameterError("lshjob merge needs at least one signature file")
    window = _window_condition(since, until)
    metas = [signature_meta(s) for s in sources]
    for meta in metas[1:]:
        check_compatible(metas[0], meta)  # before any row is read
    _check_columns(sources, metas, keep, window is not None)
    rows_in = _selected_rows(sources, window, since, until)
    memory = memory or default_memory()
    limit = Budget(memory, parts)
    if limit.one_part(budget.merge_need(rows_in, metas[0]["k"])):
        tables = [(_read(pl.scan_parquet(s), window), m) for s, m in zip(sources, metas)]
        merged, meta = merge_signatures(tables, keep)
        write_signatures(merged, out, meta)
        return _merge_summary(out, sources, rows_in, merged.height, keep, 1)
    if parts is None:
        limit.require_copy(f"{sources[0]} (and the other inputs): the rows", "merging")
    counts = (pl.concat([_selected(pl.scan_parquet(s), window).select("entity") for s in sources],
                        how="vertical_relaxed")
              .group_by("entity").agg(pl.len().alias("events")).collect(engine="streaming").sort("entity"))
    ranges = key_ranges(counts, limit.range_bytes(counts.height, budget.MERGE_PART_SHARE), parts,
                        event_bytes=budget.merge_row_bytes(metas[0]["k"]))

    def tables():
        for selection in ranges:
            read = [(_read(pl.scan_parquet(s).filter(selection.condition), window), m)
                    for s, m in zip(sources, metas)]
            merged = merge_signatures(read, keep)[0]
            del read  # not held while the writer takes the merged rows
            yield merged
            del merged

    written = write_streamed(tables(), out, merged_meta(metas[0], keep))
    return _merge_summary(out, sources, rows_in, written, keep, len(ranges))


def signature_files(sources: list[str | Path]) -> list[str | Path]:
    """The files ``sources`` name: a name that holds ``*``, ``?`` or ``[`` and is not itself
    a file is a pattern, expanded in sorted order (as ``sign`` and ``run`` take patterns, and
    a pattern quoted from the shell reaches lshjob as it is); a pattern matching no file is
    refused."""
    files: list[str | Path] = []
    for source in sources:
        text = str(source)
        if any(ch in text for ch in PATTERN_CHARS) and not Path(text).exists():
            matched = sorted(glob.glob(text))
            if not matched:
                raise InputError(f"{text}: the pattern matches no signature files")
            files += matched
        else:
            files.append(source)
    return files


def _window_condition(since: str | None, until: str | None) -> pl.Expr | None:
    """The window as a filter on ``period`` (None without one); dates checked, and an empty
    window (``since`` after ``until``) refused, before any file is read."""
    days = {}
    for name, bound in (("since", since), ("until", until)):
        if bound is None:
            continue
        try:
            days[name] = dt.date.fromisoformat(bound)
        except (TypeError, ValueError):
            raise ParameterError(f"--{name} must be an ISO date like 2026-03-01; got {bound!r}") from None
    if not days:
        return None
    if "since" in days and "until" in days and days["since"] > days["until"]:
        raise ParameterError(f"--since {since} is after --until {until}: the window holds no period")
    cond = pl.lit(True)
    if "since" in days:
        cond = cond & (pl.col("period") >= days["since"])
    if "until" in days:
        cond = cond & (pl.col("period") <= days["until"])
    return cond


def _check_columns(sources, metas: list[dict], keep: list[str], windowed: bool) -> None:
    """Every file has the kept key columns (and ``period`` for a window), of types that agree,
    and periods kept apart are of one unit (a month and the week starting that day differ)."""
    units = {str(source): meta.get("period_unit") for source, meta in zip(sources, metas)}
    if "period" in keep and len(set(units.values())) > 1:
        (a, unit_a), (b, unit_b) = [next(item for item in units.items() if item[1] == u)
                                    for u in dict.fromkeys(units.values())][:2]
        raise InputError(f"{b}: periods by {unit_b}, but {a} has periods by {unit_a}; "
                         "--keep period needs files of one period unit")
    first: dict[str, tuple[str, pl.DataType]] = {}
    for source, meta in zip(sources, metas):
        schema = pl.read_parquet_schema(source)
        keys = meta.get("keys") or [c for c in schema if c not in ("signature", "set_size")]
        if windowed and "period" not in schema:
            raise ParameterError(
                f"{source}: --since/--until need a 'period' column; this file was signed without --period"
            )
        missing = [c for c in keep if c not in keys or c not in schema]
        if missing:
            raise InputError(f"{source}: --keep names {', '.join(missing)}, not a key column of this file; "
                             f"its key columns are {', '.join(keys)}")
        if "signature" not in schema:
            raise InputError(f"{source}: no 'signature' column; columns are {', '.join(schema)}")
        for column in keep:
            dtype = schema[column]
            seen = first.setdefault(column, (str(source), dtype))
            if dtype != seen[1] and not (dtype.is_integer() and seen[1].is_integer()):
                raise InputError(f"{source}: key column '{column}' is {dtype}, but in {seen[0]} it is {seen[1]}; "
                                 "files whose keys differ in type cannot be merged")


def _selected(frame: pl.LazyFrame, window: pl.Expr | None) -> pl.LazyFrame:
    return frame if window is None else frame.filter(window)


def _read(frame: pl.LazyFrame, window: pl.Expr | None) -> pl.DataFrame:
    return _selected(frame, window).collect()


def _selected_rows(sources, window: pl.Expr | None, since: str | None, until: str | None) -> int:
    """Rows the merge takes (the window's, from the ``period`` column alone); none is an error
    naming the window and the periods the files hold."""
    if window is None:
        rows = sum(pl.scan_parquet(s).select(pl.len()).collect().item() for s in sources)
        if rows == 0:
            raise InputError(f"{_names(sources)}: no signature rows; nothing to merge")
        return rows
    facts = pl.concat([
        pl.scan_parquet(s).select(pl.col("period").cast(pl.Date)).select(
            selected=window.sum(), first=pl.col("period").min(), last=pl.col("period").max())
        for s in sources
    ]).collect()
    rows = int(facts["selected"].sum())
    if rows == 0:
        asked = " ".join(f"--{name} {bound}" for name, bound in (("since", since), ("until", until)) if bound)
        first, last = facts["first"].min(), facts["last"].max()
        held = (f"periods in {_names(sources)} run from {first} to {last}" if first is not None
                else f"{_names(sources)} hold no rows")
        raise InputError(f"{asked} selects no rows; {held}")
    return rows


def _names(sources) -> str:
    return ", ".join(str(s) for s in sources)


def _merge_summary(out, sources, rows_in, rows_out, keep, n_parts) -> dict:
    return {"out": str(out), "inputs": [str(s) for s in sources], "rows_in": rows_in, "rows_out": rows_out,
            "keep": keep, "parts": n_parts, "peak_memory_bytes": peak_bytes()}
