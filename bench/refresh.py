"""Refresh against the full run, side by side in one process, on the library network.

    python bench/refresh.py --patrons 20000

Loans of the demo generator (lshjob.demo.generate) are cut by month. Three refreshes (window
3 months, threshold 0.5) fill the store, untimed. Then, each timed against ``run_job`` on the
same window's events with the same plan (and the two indexes compared row for row):

* small batch: late loans of 1% of the patrons, into the newest month (no period expires);
* next month: the following month's loans (a period expires, most patrons change).

A refresh today runs the whole job over the window's sets recomposed from the store, so its
time is the full run's plus folding the batch and reading the store: the ratio shows that
overhead, not an incremental saving.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import machine  # noqa: E402

from lshjob.demo.generate import generate_events  # noqa: E402
from lshjob.ingest.spec import EventSpec  # noqa: E402
from lshjob.jobs.refresh import RefreshOptions, refresh_job  # noqa: E402
from lshjob.jobs.run import RunOptions, run_job  # noqa: E402

SPEC = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--patrons", type=int, default=20_000)
    ap.add_argument("--threshold", type=float, default=0.5)
    args = ap.parse_args()
    events, _ = generate_events(args.patrons, 7)
    events = events.select("patron", "title", "borrowed_at")
    month = events["borrowed_at"].dt.month()
    options = RefreshOptions(window=3, threshold=args.threshold, top_k=20)
    print(f"machine: {machine()}")
    print(f"command: python bench/refresh.py --patrons {args.patrons} --threshold {args.threshold}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)

        def refresh(batch: pl.DataFrame, name: str) -> tuple[float, dict]:
            path = tmp / f"{name}.parquet"
            batch.write_parquet(path)
            start = time.perf_counter()
            manifest = refresh_job(path, tmp / "store", SPEC, options, tmp / "index")
            return time.perf_counter() - start, manifest

        def full(window: pl.DataFrame, plan: dict, name: str) -> float:
            path = tmp / f"{name}-window.parquet"
            window.write_parquet(path)
            run = RunOptions(threshold=args.threshold, top_k=20, perms=plan["perms"], bands=plan["bands"],
                             rows=plan["rows"], seed=plan["seed"], scheme=plan["scheme"])
            start = time.perf_counter()
            run_job(path, EventSpec(entity="patron", element="title"), run, tmp / f"{name}-full")
            seconds = time.perf_counter() - start
            same = pl.read_parquet(tmp / "index" / "neighbours.parquet").equals(
                pl.read_parquet(tmp / f"{name}-full" / "neighbours.parquet"))
            print(f"  indexes equal: {same}")
            shutil.rmtree(tmp / f"{name}-full")
            return seconds

        delivered = []
        for m in (1, 2, 3):
            batch = events.filter(month == m)
            delivered.append(batch)
            refresh(batch, f"month-{m}")
        rng = np.random.default_rng(1)
        touched = rng.choice(events["patron"].unique().sort().to_numpy(), size=max(1, args.patrons // 100),
                             replace=False)
        titles = events["title"].unique().sort().to_numpy()
        small = pl.DataFrame({"patron": touched, "title": rng.choice(titles, size=len(touched)),
                              "borrowed_at": [events.filter(month == 3)["borrowed_at"].max()] * len(touched)})
        delivered.append(small)
        cases = [("small batch (1% of patrons, no expiry)", small, pl.concat(delivered)),
                 ("next month (one period expires)", events.filter(month == 4),
                  pl.concat([*delivered, events.filter(month == 4)]).filter(
                      pl.col("borrowed_at").dt.month() >= 2))]
        print(f"{'case':<42} {'batch':>8} {'window':>9} {'changed':>8} {'refresh s':>10} {'full s':>8} {'ratio':>6}")
        for name, batch, window in cases:
            seconds, manifest = refresh(batch, name.split()[0])
            base = full(window, manifest["plan"], name.split()[0])
            r = manifest["refresh"]
            print(f"{name:<42} {batch.height:>8} {window.height:>9} {r['changed_entities']:>8} {seconds:>10.2f} "
                  f"{base:>8.2f} {seconds / base:>6.2f}")


if __name__ == "__main__":
    main()
