"""Column statistics from Parquet footers: row counts, null counts and integer bounds
without reading the data, as DuckDB's ``parquet_metadata()`` reads them (one row per column
chunk of each row group: ``row_group_num_rows``, ``stats_null_count``, ``stats_min_value``
and ``stats_max_value`` decoded by the column's logical type, so unsigned integers keep
the unsigned order, and ``min_is_exact``/``max_is_exact`` when the writer states them).

Only what the statistics pass of :func:`lshjob.ingest.spec.validated_events` needs is asked;
whenever a file cannot be read, lacks a statistic, or a bound is not exact, :func:`footer_stats`
returns None and the caller reads the data instead. Tested against polars' own pass over the
data. DuckDB is imported here only when called (``lshjob run`` loads it anyway for its join;
the cost on ``lshjob sign`` is measured in bench/RESULTS.md, "Parquet footer statistics").
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

FIELDS = ("file_name", "row_group_id", "row_group_num_rows", "path_in_schema", "type", "stats_null_count",
          "stats_min_value", "stats_max_value", "min_is_exact", "max_is_exact")
# COLUMNS(regex) takes the fields this DuckDB has: min_is_exact/max_is_exact are recent
CHUNKS = f"SELECT COLUMNS('^({'|'.join(FIELDS)})$') FROM parquet_metadata($files)"


def footer_stats(paths: list[Path], columns: list[str], bounds: str | None) -> dict | None:
    """Rows, null counts of ``columns`` and (for the INT32/INT64 column ``bounds``) its
    smallest and largest value over all files, from their footers: {"rows": int,
    "nulls": {column: int}, "min": int | None, "max": int | None}. None when any file
    or column chunk lacks what is asked (the caller then reads the data)."""
    import duckdb

    try:
        with duckdb.connect() as con:
            result = con.execute(CHUNKS, {"files": [str(p) for p in paths]})
            names = [d[0] for d in result.description]
            chunks = [dict(zip(names, row)) for row in result.fetchall()]
    except duckdb.Error:
        return None
    nulls, low, high = dict.fromkeys(columns, 0), None, None
    groups: dict[tuple[str, int], tuple[int, set]] = {}  # (file, row group) -> (rows, columns seen)
    for chunk in chunks:
        file, group, rows, name, kind, null_count, lo, hi, lo_exact, hi_exact = (chunk.get(f) for f in FIELDS)
        seen = groups.setdefault((file, group), (rows, set()))[1]
        if name not in nulls:
            continue
        if null_count is None:
            return None
        nulls[name] += null_count
        seen.add(name)
        if name == bounds and rows > null_count:  # some value present
            if kind not in ("INT32", "INT64") or lo is None or hi is None or lo_exact is False or hi_exact is False:
                return None
            low = int(lo) if low is None else min(low, int(lo))
            high = int(hi) if high is None else max(high, int(hi))
    if any(seen != set(columns) for _, seen in groups.values()):
        return None
    return {"rows": sum(rows for rows, _ in groups.values()), "nulls": nulls, "min": low, "max": high}


def stats_from_footers(paths: list[Path], key_names: list[str], entity: str,
                       entity_type: pl.DataType) -> pl.DataFrame | None:
    """The statistics pass's one-row frame from the Parquet files' footers, without reading
    the data (:mod:`lshjob.ingest.parquet_footer`); None unless every file is Parquet and states
    what is needed, and no key is null (nulls are then found, and reported, by reading)."""
    if not all(p.suffix.lower() in (".parquet", ".pq") for p in paths):
        return None
    integer = entity_type.is_integer()
    found = footer_stats(paths, key_names, entity if integer else None)
    if found is None or any(found["nulls"].values()) or (integer and found["rows"] and found["min"] is None):
        return None
    return pl.DataFrame({"rows": [found["rows"]], **{n: [0] for n in key_names}, "__any_null": [0],
                         "__entity_min": [found["min"]], "__entity_max": [found["max"]]})
