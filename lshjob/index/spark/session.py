"""The Spark session the Spark engines share, and where its master comes from.

The master is, in this order: ``--spark-master`` (:data:`lshjob.index.engines.SETTINGS`,
key ``spark_master``); the session already running in the process (a notebook, a test);
what ``spark-submit`` was given (``--master`` and its configuration, which pyspark reads
when it starts under spark-submit); else ``local[*]``, all the cores of this machine.
"""

from __future__ import annotations

import atexit
import os
import re
import shutil
import sys
import warnings

from lshjob.errors import ParameterError
from lshjob.index import engines

LOCAL = "local[*]"


def _spark_sql():
    try:
        import pyspark.sql as spark_sql
    except ModuleNotFoundError as exc:
        raise ParameterError("the spark engine needs pyspark: pip install 'lshjob[spark]'") from exc
    return spark_sql


def session():
    """The process's Spark session: the running one, else a new one on the chosen master."""
    spark_sql = _spark_sql()
    master = engines.SETTINGS.get("spark_master")
    active = spark_sql.SparkSession.getActiveSession()
    if active is not None:
        running = active.sparkContext.master
        if master and master != running:
            raise ParameterError(f"--spark-master {master!r}: this process already runs Spark on {running!r}")
        return active
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        raise ParameterError("the spark engine needs Java 17 or later: java is not on PATH and JAVA_HOME is not set")
    submitted = "PYSPARK_GATEWAY_PORT" in os.environ  # started by spark-submit: its master and configuration
    chosen = master or (None if submitted else LOCAL)
    if chosen is not None and chosen.startswith("local") and "PYSPARK_PYTHON" not in os.environ:
        os.environ["PYSPARK_PYTHON"] = sys.executable  # workers on this machine run this interpreter
    builder = spark_sql.SparkSession.builder.appName("lshjob").config("spark.ui.showConsoleProgress", "false")
    if chosen is not None:
        builder = builder.master(chosen)
    local_slots = _local_slots(chosen) if not submitted else None
    if local_slots is not None:  # Spark's 200 shuffle partitions cost a task each on a few local cores
        builder = builder.config("spark.sql.shuffle.partitions", str(4 * local_slots))
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*pandas", category=FutureWarning)
        try:
            spark = builder.getOrCreate()
        except Exception as exc:  # the JVM did not start: one line, not the gateway's traceback
            if type(exc).__name__ in ("PySparkRuntimeError", "Py4JError", "Py4JJavaError"):
                raise ParameterError(f"Spark did not start on {chosen or 'the spark-submit master'}: "
                                     f"{str(exc).splitlines()[0]}") from exc
            raise
    spark.sparkContext.setLogLevel("ERROR")
    atexit.register(spark.stop)  # ours: stopped before the JVM goes, so executors end cleanly
    return spark


def _local_slots(master: str | None) -> int | None:
    """Task slots of a ``local``, ``local[N]``, ``local[*]`` or ``local[N,F]`` master; None for
    any other master (a cluster's shuffle partitions are its operators' choice)."""
    m = re.fullmatch(r"local(?:\[(\*|\d+)(?:,\d+)?\])?", master or "")
    if m is None:
        return None
    if m.group(1) is None:
        return 1
    if m.group(1) == "*":
        return os.cpu_count() or 1
    return max(1, int(m.group(1)))


def file_frame(spark, files: list[str]):
    """A DataFrame of ``path`` and ``row_group``, one row group of the Parquet ``files`` a
    partition (so one task reads one row group; no shuffle). Only the footers are read here."""
    import pyarrow.parquet as pq

    pieces = [(f, g) for f in files for g in range(pq.ParquetFile(f).metadata.num_row_groups)]
    return spark.sparkContext.parallelize(pieces, max(1, len(pieces))).toDF("path string, row_group int")


def versions() -> dict[str, str]:
    """The Spark version and master of the session, for the manifest."""
    spark = session()
    return {"spark": spark.version, "spark_master": spark.sparkContext.master}


def quiet_pandas_warning() -> None:
    """pyspark 4 warns on every Arrow call that pandas 3 is not fully supported; the engines
    hand Arrow batches only, never pandas."""
    warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)


class SparkStage:
    """What every Spark engine shares: its registry name, the session started before any work
    (a missing Java or pyspark fails early), and the Spark version for the manifest."""

    name = "spark"

    def prepare(self) -> None:
        session()

    def engine_versions(self) -> dict[str, str]:
        return versions()
