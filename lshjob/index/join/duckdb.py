"""DuckDB join engine: bucket rows -> candidate pairs of representatives (contract in
:mod:`lshjob.index.join.base`).

The SQL lives in ``sql/sized_bucket_rows.sql`` (reads the bucket files once, with each
bucket's size), ``sql/split_oversize.sql`` (splits buckets over the cap by the next band's
bucket), ``sql/bucket_skew.sql``, ``sql/candidates.sql`` and, for a run in parts,
``sql/candidate_blocks.sql``. Large joins whose pairs rarely repeat across bands
(``sql/pair_repeats.sql`` measures it on a sample) write ``sql/candidate_rows.sql`` instead of
``sql/candidates.sql``: a row per band a pair met in, without the GROUP BY, which cost about
seven times the join on long-tailed data; verification deduplicates the pairs it keeps.
Then buckets of ``settings.crowd_size`` members or more are not paired in SQL at all: their
members go to a CROWDS file (``sql/crowds.sql``) and verification pairs them up, a bucket's
sets at a time (no pair row written or read back); buckets are then split, or left out, only
over ``settings.max_crowd`` members (``JoinSettings.crowd_cap``).
DuckDB runs with a memory limit and a spill directory, so a
join larger than memory spills to disk instead of failing (its memory model:
:mod:`lshjob.index.join.memory`).
"""

from __future__ import annotations

from pathlib import Path

import duckdb

from lshjob.core.atomic import atomic_file, staged_folder
from lshjob.index.join.base import JoinOutput, JoinSettings
from lshjob.index.sqlfiles import load_sql, string_literal


class DuckDBJoin:
    """The join engine on an in-process DuckDB (:class:`lshjob.index.join.base.JoinEngine`)."""

    name = "duckdb"

    def candidates(self, bucket_files, bands: int, out: Path, settings: JoinSettings,
                   bucket_rows: int | None = None, ranges=None) -> JoinOutput:
        joined = candidate_pairs(list(bucket_files), out, settings, bands, bucket_rows,
                                 part_ranges=list(ranges) if ranges is not None else None)
        return JoinOutput(out, joined["candidate_pairs"], joined["skew"], joined["crowds"], joined["rows_per_band"],
                          joined["reserve"])


def connect(settings: JoinSettings) -> duckdb.DuckDBPyConnection:
    config = {"memory_limit": settings.memory_limit, "preserve_insertion_order": False}
    if settings.temp_directory is not None:
        config["temp_directory"] = settings.temp_directory
    if settings.threads is not None:
        config["threads"] = settings.threads
    con = duckdb.connect(config=config)
    con.execute("SET enable_progress_bar = false")  # lshjob shows its own progress
    return con


def candidate_pairs(bucket_files: list[Path], out: Path, settings: JoinSettings, bands: int,
                    bucket_rows: int | None = None, part_ranges: list[tuple[int, int]] | None = None) -> dict:
    """Write candidate pairs to ``out`` (Parquet); return counts and the skew report.

    ``bucket_rows`` is the number of all bucket rows when the files hold only the rows of
    shared buckets (:mod:`lshjob.index.band`); by default, the files' own row count. ``part_ranges``
    (first and last entity id of each part, consecutive) makes ``out`` a folder split by
    the parts of each pair (module contract)."""
    files = [str(p) for p in bucket_files]

    params = {"max_bucket": settings.max_bucket}
    con = connect(settings)
    try:
        if bucket_rows is None:
            bucket_rows = con.execute("SELECT count(*) FROM read_parquet($f)", {"f": files}).fetchone()[0]
        con.execute(load_sql("sized_bucket_rows"), {"bucket_files": files})
        con.execute(load_sql("split_oversize"), {"max_bucket": settings.max_bucket, "bands": bands})
        skew_row = con.execute(load_sql("bucket_skew"), {**params, "bucket_rows": bucket_rows}).fetchone()
        columns = [d[0] for d in con.description]
        skew = {name: int(value) for name, value in zip(columns, skew_row)}
        per_band = _rows_per_band(con, settings, skew)
        query = load_sql("candidate_rows" if per_band else "candidates").strip().rstrip(";")
        if per_band:
            params["crowd_size"] = max(3, settings.crowd_size)
            cap = settings.crowd_cap()
            if cap != settings.max_bucket:  # buckets over max_bucket are crowds up to the crowd cap
                params["max_bucket"] = cap
                con.execute(load_sql("split_oversize"), {"max_bucket": cap, "bands": bands})
                skew_row = con.execute(load_sql("bucket_skew"),
                                       {"max_bucket": cap, "bucket_rows": bucket_rows}).fetchone()
                skew = {name: int(value) for name, value in zip(columns, skew_row)}
        # scratch of the run (not flushed to disk: a crashed run never reads it again)
        if part_ranges is None:
            with atomic_file(out, fsync=False) as tmp:
                con.execute(f"COPY ({query}) TO {string_literal(str(tmp))} (FORMAT parquet)", params)
            pattern = str(out)
        else:
            con.execute("CREATE TEMP TABLE part_ranges (part INTEGER, first_id BIGINT, last_id BIGINT)")
            con.executemany("INSERT INTO part_ranges VALUES (?, ?, ?)",
                            [(i, a, b) for i, (a, b) in enumerate(part_ranges)])
            blocks = load_sql("candidate_blocks").strip().rstrip(";")
            with staged_folder(out, fsync=False) as tmp:  # no pair, no file
                con.execute(f"COPY (WITH candidate_rows AS ({query}) {blocks}) TO {string_literal(str(tmp))} "
                            "(FORMAT parquet, PARTITION_BY (left_part, right_part))", params)
            pattern = str(out / "**" / "*.parquet")
        found = part_ranges is None or any(out.rglob("*.parquet"))
        count = con.execute("SELECT count(*) FROM read_parquet($f)", {"f": pattern}).fetchone()[0] if found else 0
        crowds, crowd_pairs = _write_crowds(con, params, out) if per_band else (None, 0)
        reserve = None
        if settings.reserve_cap and part_ranges is None and skew["skipped_pairs"]:
            reserve = _write_reserve(con, params["max_bucket"], settings.reserve_cap, out)
    finally:
        con.close()
    skew["max_bucket"] = params["max_bucket"]
    return {"candidate_pairs": int(count) + crowd_pairs, "skew": skew, "rows_per_band": per_band,
            "crowds": crowds, "reserve": reserve}


def crowds_path(out: Path) -> Path:
    """Where the CROWDS file of candidates written at ``out`` goes (beside them)."""
    return out.parent / f"{out.stem}-crowds.parquet"


def _write_crowds(con: duckdb.DuckDBPyConnection, params: dict, out: Path) -> tuple[Path | None, int]:
    """CROWDS (sql/crowds.sql) beside ``out``, and the pairs they hold; no crowd, no file. The
    pairs are counted from the file written, not by running the query a second time."""
    query = load_sql("crowds").strip().rstrip(";")
    path = crowds_path(out)
    with atomic_file(path, fsync=False) as tmp:
        con.execute(f"COPY ({query}) TO {string_literal(str(tmp))} (FORMAT parquet)", params)
    pairs = con.execute("SELECT coalesce(sum(m * (m - 1) // 2), 0)::BIGINT FROM "
                        "(SELECT count(*) AS m FROM read_parquet($f) GROUP BY crowd)", {"f": str(path)}).fetchone()[0]
    if not pairs:
        path.unlink()
        return None, 0
    return path, int(pairs)


def _write_reserve(con: duckdb.DuckDBPyConnection, cap: int, reserve_cap: int, out: Path) -> Path | None:
    """RESERVE (sql/reserve.sql) beside ``out``: the buckets over ``cap``, up to ``reserve_cap``
    members; none, no file."""
    query = load_sql("reserve").strip().rstrip(";")
    path = out.parent / f"{out.stem}-reserve.parquet"
    with atomic_file(path, fsync=False) as tmp:
        con.execute(f"COPY ({query}) TO {string_literal(str(tmp))} (FORMAT parquet)",
                    {"max_bucket": cap, "reserve_cap": reserve_cap})
    if not con.execute("SELECT count(*) FROM read_parquet($f)", {"f": str(path)}).fetchone()[0]:
        path.unlink()
        return None
    return path


SAMPLED_ROWS = 1_000_000  # pair rows the repeat sample aims at


def _rows_per_band(con: duckdb.DuckDBPyConnection, settings: JoinSettings, skew: dict) -> bool:
    """Write a row per band (no GROUP BY) when the join holds more than ``settings.dedupe_up_to``
    pair rows and a sample of left sides shows pairs repeating at most ``settings.max_repeat``
    times on average (module docstring)."""
    rows = skew["bucket_pairs"] + skew["split_pairs"]
    if rows <= settings.dedupe_up_to:
        return False
    every = max(1, rows // SAMPLED_ROWS)
    pair_rows, pairs = con.execute(load_sql("pair_repeats"),
                                   {"max_bucket": settings.max_bucket, "every": every}).fetchone()
    return pairs > 0 and pair_rows <= settings.max_repeat * pairs
