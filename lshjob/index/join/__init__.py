"""Join stage: bucket rows -> candidate pairs (the seam in ``base``; engines by name through
:mod:`lshjob.index.engines`, so DuckDB is imported only by its engine module)."""

from lshjob.index.join.base import (
                                    CANDIDATES_SCHEMA,
                                    DEFAULT_MAX_BUCKET,
                                    DEFAULT_MAX_CROWD,
                                    SKEW_COLUMNS,
                                    JoinEngine,
                                    JoinOutput,
                                    JoinSettings,
)
from lshjob.index.join.memory import duckdb_beyond, duckdb_limit, duckdb_need, join_threads, require_duckdb_memory

__all__ = ["CANDIDATES_SCHEMA", "DEFAULT_MAX_BUCKET", "DEFAULT_MAX_CROWD", "SKEW_COLUMNS", "JoinEngine", "JoinOutput",
           "JoinSettings",
           "duckdb_beyond", "duckdb_limit", "duckdb_need", "join_threads", "require_duckdb_memory"]
