"""The DuckDB join's memory, measured: what its ``memory_limit`` must be for a join of so many
shared bucket rows, and what it takes beyond that limit. Kept apart from
:mod:`lshjob.index.join.duckdb` so a run can size the join without importing DuckDB.
"""

from __future__ import annotations

import os

from lshjob.errors import ParameterError

# DuckDB's memory_limit caps its buffer manager, not every allocation. With 2 threads a join
# took 51-57 MiB beyond it at 2M shared rows, 58-64 at 5M, 99-142 at 20M (limits 64-512 MiB;
# bench/join_memory.py): about 28 MiB a thread and 5 bytes a row (the part per thread assumed).
DUCKDB_BEYOND_PER_THREAD = 28 << 20
DUCKDB_BEYOND_PER_ROW = 5
# The smallest limit the join works under: 2M shared rows ran under 64 MiB (not 32), 5M under
# 96 MiB, 20M under 256 MiB (not 192; measured): 48 MiB and 12 bytes a row.
DUCKDB_FLOOR = 48 << 20
DUCKDB_BYTES_PER_ROW = 12


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
