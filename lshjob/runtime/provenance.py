"""Where a run's index came from, for its manifest: run id, times, host, command, and the
input files (absolute paths, sizes, modification times and sha256, each and all together:
:mod:`lshjob.core.digest`).
"""

from __future__ import annotations

import platform
import secrets
import socket
from concurrent.futures import Future
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import polars as pl

from lshjob._version import __version__
from lshjob.core.digest import iso  # noqa: F401  (re-exported: the manifest's times)


def utc_now() -> datetime:
    return datetime.now(UTC)


def new_run_id(started: datetime) -> str:
    """The start time (UTC, to the second) and 6 random hex digits: sorts by time, and two
    runs started in the same second still differ."""
    return f"{started.astimezone(UTC):%Y%m%dT%H%M%SZ}-{secrets.token_hex(3)}"


def host() -> str:
    return socket.gethostname()


def inputs(events, report, digest: Future) -> dict:
    """The manifest's ``inputs``: ``source`` is the absolute form of what was given (a file,
    glob or folder), so an audit run from elsewhere finds it; ``given`` is as typed."""
    (sizes, sha256), per_file = digest.result()
    return {"source": str(Path(events).absolute()), "given": str(events), "files": per_file,
            "bytes": sizes, "rows": report.rows_read, "sha256": sha256, "time_range": None}


def neighbours_metadata(run_id: str, options, spec, top_k: int) -> dict:
    """The ``lshjob`` key-value record of ``neighbours.parquet``."""
    return {"format": "lshjob-neighbours", "format_version": 1, "run_id": run_id,
            "threshold": options.threshold, "top_k": options.top_k, "top_k_effective": top_k,
            "entity_column": spec.entity, "element_column": spec.element, "lshjob": __version__}


def versions() -> dict:
    import duckdb
    import numba

    return {"lshjob": __version__, "python": platform.python_version(), "polars": pl.__version__,
            "numpy": np.__version__, "duckdb": duckdb.__version__, "numba": numba.__version__}
