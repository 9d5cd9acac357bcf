"""The refresh store: per-period Parquet files and a DuckDB catalog of periods, files, plan and runs."""

from lshjob._lazy import exports

__all__ = [
    "check_files", "commit", "is_store", "read_state", "runs",
]

__getattr__, __dir__ = exports(__name__, {
    "read_state": "catalog",
    "runs": "catalog",
    "commit": "catalog",
    "is_store": "files",
    "check_files": "files",
})
