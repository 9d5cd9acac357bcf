"""``lshjob run --engine spark``: the same neighbours.parquet rows as the local engine, the
manifest naming Spark, clear errors; and a run on a cluster of separate processes.

The stage contracts and whole runs of the Spark engines are checked with every other engine's
in tests/test_engines.py; these tests cover the command line and what only Spark brings.
Every test skips, saying why, without pyspark or Java (the ``spark_session`` fixture).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.report.text import run_report

DEMO = ["--entity", "patron", "--element", "title", "--threshold", "0.5", "--top-k", "10"]


@pytest.fixture(scope="module")
def loans(tmp_path_factory, demo_events):
    """Loans of the library demo (1000 patrons), as Parquet."""
    path = tmp_path_factory.mktemp("spark-loans") / "loans.parquet"
    demo_events[0].select("patron", "title").write_parquet(path)
    return path


def _run(*args) -> tuple[int, str, str]:
    done = CliRunner().invoke(app, ["run", *map(str, args)])
    return done.exit_code, done.stdout, done.stderr


def _brute_force_jaccard(events: pl.DataFrame) -> dict:
    sets = {}
    for patron, title in events.select("patron", "title").iter_rows():
        sets.setdefault(patron, set()).add(title)
    return sets


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_a_run_on_spark_publishes_the_local_engines_rows(scheme, loans, demo_events, spark_session, tmp_path):
    # Oracle: the local engine's neighbours.parquet of the same command (rows equal, floats
    # bit for bit), and each published Jaccard recomputed by brute force with Python sets.
    code, _, err = _run(loans, *DEMO, "--scheme", scheme, "--out", tmp_path / "local", "--quiet")
    assert code == 0, err
    code, out, err = _run(loans, *DEMO, "--scheme", scheme, "--out", tmp_path / "spark", "--engine", "spark", "--json")
    assert code == 0, err
    manifest = json.loads(out)
    expected = pl.read_parquet(tmp_path / "local" / "neighbours.parquet")
    got = pl.read_parquet(tmp_path / "spark" / "neighbours.parquet")
    assert expected.height > 100
    assert got.equals(expected)
    sets = _brute_force_jaccard(demo_events[0])
    for entity, neighbour, jaccard in got.select("entity", "neighbour", "jaccard").iter_rows():
        a, b = sets[entity], sets[neighbour]
        assert jaccard == len(a & b) / len(a | b)
    # Oracle for the versions: the pyspark package and the running session.
    import pyspark

    assert manifest["engines"] == {"band": "spark", "join": "spark", "verify": "spark"}
    assert manifest["options"]["engine"] == "spark"
    assert manifest["versions"]["spark"] == pyspark.__version__
    assert manifest["versions"]["spark_master"] == spark_session.sparkContext.master == "local[2]"
    # Oracle for the wording: options.engine "spark" is documented as the whole run on Spark.
    expected_line = f"on Spark {pyspark.__version__} (local[2]): the whole run (the plan's sample on the driver)"
    assert expected_line in run_report(manifest).splitlines()


def test_spark_options_are_refused_with_one_line(loans, spark_session, tmp_path):
    # Oracle: the documented messages and exit code 2 (bad options), nothing written.
    code, _, err = _run(loans, *DEMO, "--out", tmp_path / "a", "--engine", "gpu")
    assert (code, err.strip()) == (2, "error: --engine must be one of local, spark; got 'gpu'")
    code, _, err = _run(loans, *DEMO, "--out", tmp_path / "b", "--spark-master", "local[2]")
    assert (code, err.strip()) == (2, "error: --spark-master goes with --engine spark")
    code, _, err = _run(loans, *DEMO, "--out", tmp_path / "c", "--engine", "spark", "--spark-master", "yarn")
    assert (code, err.strip()) == (2, "error: --spark-master 'yarn': this process already runs Spark on 'local[2]'")
    assert not any((tmp_path / d).exists() for d in "abc")


def test_import_lshjob_and_a_local_run_load_no_pyspark():
    # Oracle: sys.modules in a fresh interpreter.
    code = ("import sys, lshjob, lshjob.jobs.run, lshjob.cli.app, lshjob.index.engines as e; "
            "e.get_engine('join', 'duckdb'); print('pyspark' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False)
    assert done.stdout.split() == ["False"], done.stderr[-2000:]


CLUSTER = "local-cluster[2,1,1024]"  # a master and two executors, each a JVM with its Python workers
CLUSTER_TESTS = "LSHJOB_SPARK_CLUSTER_TESTS"


@pytest.mark.skipif(os.environ.get(CLUSTER_TESTS) != "1",
                    reason=f"a cluster of separate JVMs takes a minute or more: set {CLUSTER_TESTS}=1 to run it")
def test_a_run_on_a_cluster_of_separate_processes_publishes_the_local_rows(loans, spark_session, tmp_path):
    # Oracle: the local engine's rows. The run is a child process whose executors are separate
    # JVMs with their own Python workers: the engines' functions and settings must pickle, and
    # each executor loads (or compiles) the kernels in its own processes.
    code, _, err = _run(loans, *DEMO, "--out", tmp_path / "local", "--quiet")
    assert code == 0, err
    env = dict(os.environ, PYSPARK_PYTHON=sys.executable)
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", str(loans), *DEMO, "--out",
                           str(tmp_path / "cluster"), "--engine", "spark", "--spark-master", CLUSTER, "--json"],
                          capture_output=True, text=True, timeout=600, env=env, check=False)
    if done.returncode == 2 and "Spark did not start" in done.stderr:
        pytest.skip(f"a {CLUSTER} cluster did not start here: {done.stderr.strip().splitlines()[-1]}")
    assert done.returncode == 0, done.stderr[-3000:]
    assert json.loads(done.stdout)["versions"]["spark_master"] == CLUSTER
    expected = pl.read_parquet(tmp_path / "local" / "neighbours.parquet")
    assert pl.read_parquet(tmp_path / "cluster" / "neighbours.parquet").equals(expected)


@pytest.mark.parametrize(("master", "slots"), [
    ("local", 1), ("local[3]", 3), ("local[3,2]", 3), ("local[*]", os.cpu_count()),
    ("local-cluster[2,1,1024]", None), ("spark://master.example:7077", None), ("yarn", None), (None, None),
])
def test_local_masters_get_shuffle_partitions_by_their_task_slots(master, slots):
    # Oracle: Spark's documented master URLs ("Master URLs", Spark configuration docs, from
    # memory): local is one thread, local[K] and local[K,F] K threads, local[*] one per core;
    # any other master is a cluster whose settings are left alone.
    from lshjob.index.spark.session import _local_slots

    assert _local_slots(master) == slots
