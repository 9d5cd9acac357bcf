"""The whole run on Spark against the local engine, side by side in one process, and a sizing table.

    python bench/spark.py --entities 1000000

Both runs use ``run_job`` on the same events (the library network growing by branches,
:func:`common.branch_network_events`) with the same options and plan; the Spark run
(``--engine spark``) reads the events with Spark and does every stage there on
``local[N]`` (``--master``) except the plan and the last write of neighbours.parquet, which
the driver streams from Spark's sorted parts. The two indexes must be equal row for row.

From the Spark run: the throughput of each Spark stage per task slot, which is one
partition processed at a time (its work divided by its seconds times the slots, the
marginal rate between a small slice and the whole input, so without each stage's fixed
cost of jobs and tasks), and from it the cores and executors that would do 100M entities
in an hour, assuming each stage's work grows linearly with the entities (it does for this
data: each patron has a bounded number of look-alikes and loans) and the throughput per
core holds on a cluster (shuffles over a network cost more; the table says so).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine  # noqa: E402

from lshjob import EventSpec  # noqa: E402
from lshjob.jobs.run import RunOptions, run_job  # noqa: E402

SPEC = EventSpec(entity="entity", element="element")
SPARK_STAGES = ("ingest", "collapse", "join", "verify", "publish")
DRIVER_STAGES = ("plan",)
TARGET = 100_000_000
HOUR = 3600.0


def session(master: str, partitions: int):
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    warnings.simplefilter("ignore", FutureWarning)
    spark = (SparkSession.builder.master(master).appName("lshjob-bench")
             .config("spark.sql.shuffle.partitions", str(partitions)).config("spark.ui.enabled", "false")
             .config("spark.ui.showConsoleProgress", "false").config("spark.driver.memory", "6g").getOrCreate())
    spark.sparkContext.setLogLevel("ERROR")
    return spark


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--entities", type=int, default=100_000)
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--master", default="local[2]")
    ap.add_argument("--partitions", type=int, default=8, help="spark.sql.shuffle.partitions")
    ap.add_argument("--executor-cores", type=int, default=4, help="cores per executor in the sizing table")
    ap.add_argument("--no-write", action="store_true", help="print only; do not add to RESULTS.md")
    args = ap.parse_args()

    events = branch_network_events(args.entities)
    options = dict(threshold=args.threshold, top_k=20, perms=128, bands=16, rows=8)  # one plan for both runs
    start = time.perf_counter()
    spark = session(args.master, args.partitions)
    started = time.perf_counter() - start
    slots = spark.sparkContext.defaultParallelism
    with tempfile.TemporaryDirectory(prefix="lshjob-bench-spark-") as tmp:
        tmp = Path(tmp)
        runs = {}
        # warm-up on a small slice: kernels compiled in every process, Spark's JIT and workers
        small = tmp / "small.parquet"
        pl.scan_parquet(str(events) + "/*.parquet").head(20_000).collect().write_parquet(small)
        for n, engine in enumerate(("local", "spark", "spark")):  # the second small Spark run: the fixed costs
            runs[f"small {engine}"] = (0.0, run_job(small, SPEC, RunOptions(**options, engine=engine),
                                                    tmp / f"warm-{n}"))
        # the local run twice (its first run at full size still compiles a few kernels), then Spark
        for name, engine in (("first local", "local"), ("local", "local"), ("spark", "spark")):
            t = time.perf_counter()
            manifest = run_job(events, SPEC, RunOptions(**options, engine=engine), tmp / name)
            runs[name] = (time.perf_counter() - t, manifest)
        same = pl.read_parquet(tmp / "local" / "neighbours.parquet").equals(
            pl.read_parquet(tmp / "spark" / "neighbours.parquet"))
    if not same:
        raise SystemExit("the Spark engines published other rows than the local ones")
    report(args, runs, slots, started, spark.version)


def report(args, runs: dict, slots: int, started: float, version: str) -> None:
    local_s, local = runs["local"]
    spark_s, remote = runs["spark"]
    counts = remote["counts"]
    small = runs["small spark"][1]

    def work_of(c: dict) -> dict:
        return {"ingest": c["events"], "collapse": c["entities"], "join": c["representatives"],
                "verify": c["candidate_pairs"], "publish": c["published_rows"]}

    work, small_work = work_of(counts), work_of(small["counts"])
    units = {"ingest": "events read, hashed and grouped", "collapse": "entities numbered and grouped",
             "join": "representatives signed, banded, joined", "verify": "candidate pairs",
             "publish": "rows ranked and written"}
    lines = [
        f"Machine: {machine()} (shared with other jobs during the run: timings are noisy, ratios are from one run)",
        f"Data: the library network by branches, {args.entities:,} patrons, {counts['events']:,} loans; "
        f"threshold {args.threshold}, k=128, 16 bands x 8 rows; Spark {version} on {args.master}, "
        f"{args.partitions} shuffle partitions, {slots} task slots",
        f"Command: `python bench/spark.py --entities {args.entities} --master '{args.master}'`",
        "",
        "The whole run on Spark (`--engine spark`: events read by Spark, grouped, signed and banded on the "
        "executors; join, verify, top-k in Spark; the driver plans and streams the sorted parts into "
        "neighbours.parquet). Both indexes are equal row for row. Warm: kernels compiled and Spark's workers "
        f"started on a small slice first; the session itself took {started:.1f} s to start (not counted).",
        "",
        "| stage | local s | spark s | spark / local |",
        "| --- | ---: | ---: | ---: |",
    ]
    merged = {"ingest": ("ingest",), "collapse": ("collapse",), "plan": ("plan",),
              "join": ("sign", "band", "join"), "verify": ("verify",), "publish": ("publish",)}
    for stage, parts in merged.items():
        a = sum(local["seconds"].get(p, 0.0) for p in parts)
        b = remote["seconds"].get(stage, 0.0)
        name = "sign + band + join" if stage == "join" else stage
        where = "driver" if stage in DRIVER_STAGES else "spark"
        lines.append(f"| {name} ({where}) | {a:.2f} | {b:.2f} | {b / a if a else float('nan'):.2f}x |")
    lines.append(f"| whole run | {local_s:.2f} | {spark_s:.2f} | {spark_s / local_s:.2f}x |")
    lines += ["", "Throughput of the Spark stages per task slot (a slot works one partition at a time): the work "
              f"added from the small slice ({small['counts']['entities']:,} patrons) to the whole input, divided by "
              "the seconds added times the slots (the marginal rate; the fixed cost of a stage's jobs and tasks is "
              "its small-slice seconds):", "",
              "| stage | work | small slice s | whole s | per slot per second | core-hours for 100M entities |",
              "| --- | ---: | ---: | ---: | ---: | ---: |"]
    core_seconds, fixed = 0.0, 0.0
    for stage in SPARK_STAGES:
        t_small, t_big = small["seconds"][stage], remote["seconds"][stage]
        rate = (work[stage] - small_work[stage]) / max(1e-3, (t_big - t_small) * slots)
        need = work[stage] * TARGET / args.entities / rate
        core_seconds += need
        fixed += t_small
        lines.append(f"| {stage} | {work[stage]:,} {units[stage]} | {t_small:.2f} | {t_big:.2f} | {rate:,.0f} | "
                     f"{need / HOUR:.2f} |")
    cores = math.ceil(core_seconds / HOUR)
    driver = sum(remote["seconds"].get(s, 0.0) for s in DRIVER_STAGES)
    lines += ["", f"Sizing for {TARGET:,} entities in an hour (every stage but the plan on the cluster; linear in "
              "the entities):", "",
              f"| utilisation assumed | cores | executors of {args.executor_cores} cores |", "| --- | ---: | ---: |"]
    for share in (1.0, 0.5, 0.25):
        c = math.ceil(core_seconds / HOUR / share)
        lines.append(f"| {share:.0%} of the measured throughput | {c} | {math.ceil(c / args.executor_cores)} |")
    lines += ["", f"At the measured throughput, {cores} cores do the Spark stages of {TARGET:,} entities in an hour. "
              f"Overhead: the Spark stages cost {fixed:.1f} s on the small slice whatever the size (jobs, tasks, "
              f"shuffle files, Python workers), and the whole run took {spark_s / local_s:.1f}x the local engine's "
              f"time on the same {slots} cores. The driver's part: the plan ({driver:.1f} s here, on a sample of "
              "--sample-size entities: it does not grow with the input) and streaming the parts into one file, "
              f"{counts['published_rows']:,} rows here."]
    finish(f"The whole run on Spark against the local engine, {args.entities:,} entities", "\n".join(lines),
           not args.no_write)


if __name__ == "__main__":
    main()
