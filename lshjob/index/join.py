"""Join stage (DuckDB): bucket rows -> candidate pairs of representatives.

The SQL lives in ``sql/sized_bucket_rows.sql`` (reads the bucket files once, with each
bucket's size), ``sql/split_oversize.sql`` (splits buckets over the cap by the next band's
bucket), ``sql/bucket_skew.sql`` and ``sql/candidates.sql``. DuckDB runs with a
memory limit and a spill directory, so a join larger than memory spills to disk instead
of failing.

Output of :func:`candidate_pairs`: a Parquet file of CANDIDATES (:mod:`lshjob.contracts.tables`:
one row per unordered pair of representatives, ``bands_shared`` from 1 to the bands), in no
particular order; and a skew report (dict). Given the entity id ranges of a
run's parts (:mod:`lshjob.jobs.parts`), a folder instead, the same rows split by the parts of
their two sides: ``left_part=i/right_part=j/*.parquet`` (``i <= j``; ``sql/candidate_blocks.sql``).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import duckdb

from lshjob.core.atomic import atomic_file, staged_folder
from lshjob.errors import ParameterError
from lshjob.index.sqlfiles import load_sql, string_literal

DEFAULT_MAX_BUCKET = 2000

# DuckDB's memory_limit caps its buffer manager, not every allocation. With 2 threads a join
# took 51-57 MiB beyond it at 2M shared rows, 58-64 at 5M, 99-142 at 20M (limits 64-512 MiB;
# bench/join_memory.py): about 28 MiB a thread and 5 bytes a row (the part per thread assumed).
DUCKDB_BEYOND_PER_THREAD = 28 << 20
DUCKDB_BEYOND_PER_ROW = 5
# The smallest limit the join works under: 2M shared rows ran under 64 MiB (not 32), 5M under
# 96 MiB, 20M under 256 MiB (not 192; measured): 48 MiB and 12 bytes a row.
DUCKDB_FLOOR = 48 << 20
DUCKDB_BYTES_PER_ROW = 12


@dataclass(frozen=True)
class JoinSettings:
    memory_limit: str = "4GB"
    temp_directory: str | None = None
    threads: int | None = None
    max_bucket: int = DEFAULT_MAX_BUCKET


def join_threads() -> int:
    """DuckDB's threads: the cores this process may run on (each thread has working memory
    of its own, counted in :func:`duckdb_limit`)."""
    return max(1, len(os.sched_getaffinity(0)))


def duckdb_need(shared_rows: int) -> int:
    """The smallest ``memory_limit`` under which the join of ``shared_rows`` rows of shared
    buckets runs (measured, see the constants)."""
    return DUCKDB_FLOOR + DUCKDB_BYTES_PER_ROW * shared_rows


def duckdb_beyond(shared_rows: int, threads: int) -> int:
    """What DuckDB takes beyond its ``memory_limit`` in the join (measured, see the constants)."""
    return threads * DUCKDB_BEYOND_PER_THREAD + DUCKDB_BEYOND_PER_ROW * shared_rows


def duckdb_limit(memory: int, held: int, shared_rows: int, threads: int) -> int:
    """DuckDB's ``memory_limit``: what the budget leaves beside the ``held`` bytes resident in
    the process, less what DuckDB takes beyond its limit."""
    return memory - held - duckdb_beyond(shared_rows, threads)


def require_duckdb_memory(limit: int, shared_rows: int, held: int, memory: int, threads: int) -> None:
    """Refuse a join that could not run within the budget: one line with what it needs."""
    need = duckdb_need(shared_rows)
    if limit < need:
        beyond = duckdb_beyond(shared_rows, threads)
        raise ParameterError(
            f"the join of {shared_rows} shared bucket rows needs about {(held + need + beyond) / 2**30:.2f} GiB "
            f"({(need + beyond) / 2**20:.0f} MiB for DuckDB with {threads} threads, beside "
            f"{held / 2**30:.2f} GiB the run holds); the budget is {memory / 2**30:.2f} GiB; raise --memory")


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
    shared buckets (lshjob/index/band.py); by default, the files' own row count. ``part_ranges``
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
        query = load_sql("candidates").strip().rstrip(";")
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
    finally:
        con.close()
    skew["max_bucket"] = settings.max_bucket
    return {"candidate_pairs": int(count), "skew": skew}
