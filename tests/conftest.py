"""Shared fixtures: small event tables written in each supported format."""

from __future__ import annotations

import subprocess
import sys

import polars as pl
import pytest

from lshjob.demo.generate import generate_events


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
def compiled_kernels():
    """Every kernel compiled into the compile cache (``lshjob compile-kernels``, once a test
    session), so that a test measuring a child process's memory does not count the compiler's
    (LLVM holds a few hundred MiB while it compiles, once per machine)."""
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "compile-kernels", "--quiet"],
                          capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr


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
