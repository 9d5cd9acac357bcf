"""Shared fixtures: small event tables written in each supported format, the session's compile
cache, one Spark session."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

# One compile cache for the whole session, in the checkout (git ignores it): set before lshjob
# is imported, so this process and every child process it starts use it. A fresh clone starts
# it empty, so `lshjob compile-kernels` at the session's start pays the cold compile once, and
# tests/test_compile_cache.py checks that compile on it instead of paying a second one.
KERNEL_CACHE = Path(__file__).resolve().parent.parent / ".test-kernel-cache"
os.environ["LSHJOB_CACHE_DIR"] = str(KERNEL_CACHE)

import polars as pl  # noqa: E402
import pytest  # noqa: E402

from lshjob.demo.generate import generate_events  # noqa: E402

_KERNEL_FILL: dict = {}


def _fill_kernel_cache() -> None:
    was_empty = not KERNEL_CACHE.exists() or not any(KERNEL_CACHE.rglob("*.nbi"))
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "compile-kernels", "--json"],
                          capture_output=True, text=True, timeout=1200)
    _KERNEL_FILL.update(was_empty=was_empty, returncode=done.returncode, stderr=done.stderr,
                        summary=json.loads(done.stdout) if done.returncode == 0 else None)


def pytest_sessionstart(session):
    """An empty session cache (a fresh clone, as in CI) is filled by ``lshjob compile-kernels``
    before any test, so the check of that command sees it fill an empty folder; a folder
    already filled is brought up to date only when a test asks for it (``compiled_kernels``)."""
    if not KERNEL_CACHE.exists() or not any(KERNEL_CACHE.rglob("*.nbi")):
        _fill_kernel_cache()


@pytest.fixture(scope="session")
def demo_events() -> tuple[pl.DataFrame, pl.DataFrame]:
    """The library demo at 1000 patrons (seeded): (events, planted)."""
    return generate_events(1000, seed=11)


@pytest.fixture
def small_events(tmp_path):
    """A tiny hand-made loan table, written as Parquet; returns its path."""
    frame = pl.DataFrame(
        {
            "patron": ["ann", "ann", "ann", "bob", "bob", "cy"],
            "title": ["t1", "t2", "t2", "t1", "t3", "t9"],
            "branch": ["Harbour", "Harbour", "Hilltop", "Harbour", "Harbour", "Hilltop"],
            "borrowed_at": pl.Series(
                ["2026-01-03", "2026-02-11", "2026-02-12", "2026-01-05", "2026-03-01", "2026-03-02"]
            ).str.to_datetime(),
            "loans": [1, 2, 1, 1, 1, 3],
        }
    )
    path = tmp_path / "loans.parquet"
    frame.write_parquet(path)
    return path


@pytest.fixture(scope="session")
def compiled_kernels() -> dict:
    """Every kernel compiled into the session's compile cache (``lshjob compile-kernels`` at the
    session's start), so that a test measuring a child process's memory does not count the
    compiler's (LLVM holds a few hundred MiB while it compiles). Returns what that command
    did: ``was_empty`` (no cache file before it) and its ``--json`` summary."""
    if not _KERNEL_FILL:
        _fill_kernel_cache()
    assert _KERNEL_FILL["returncode"] == 0, _KERNEL_FILL["stderr"]
    return dict(_KERNEL_FILL)


@pytest.fixture(scope="session")
def spark_session():
    """One Spark session on ``local[2]`` for every Spark test (a JVM start costs 10-20 s), with
    few shuffle partitions (the tests' data are small); skips, saying why, without pyspark or Java."""
    import os
    import shutil
    import warnings

    try:
        from pyspark.sql import SparkSession
    except ImportError:
        pytest.skip("pyspark is not installed (pip install 'lshjob[spark]')")
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        pytest.skip("Java is not installed (java not on PATH, JAVA_HOME not set): the Spark engines need Java 17")
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    builder = (SparkSession.builder.master("local[2]").appName("lshjob-tests")
               .config("spark.sql.shuffle.partitions", "2").config("spark.default.parallelism", "2")
               .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false"))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)
            spark = builder.getOrCreate()
    except Exception as exc:  # noqa: BLE001  (a JVM that does not start is a reason to skip, named)
        pytest.skip(f"Spark did not start on local[2]: {str(exc).splitlines()[0]}")
    spark.sparkContext.setLogLevel("ERROR")
    yield spark
    spark.stop()
