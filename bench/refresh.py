"""Refresh against the full run, side by side in one process, on the library network.

    python bench/refresh.py --patrons 100000

Loans of the demo generator (lshjob.demo.generate) are cut by month. The first refresh of months
1-3 (window 3 months, threshold 0.5) fills the store (it builds the state from nothing), timed
against the full run on the same loans. Then, each timed against ``run_job`` on the
same window's events with the same plan (and the two indexes compared row for row), with
the peak resident memory of each (the largest of its stages' high-water marks and of resident memory
sampled every 5 ms):

* late loans of a fraction of the patrons (``--fractions``, 1% among them), into the newest
  month: no period expires; a curve of refresh time against the fraction changed;
* next month: the following month's loans (a month expires, most patrons change);
* a daily window over daily periods (``--days``): a store filled with that many days at
  once, then the next day's loans (a day expires: every patron of that day changes).

Each refresh's own breakdown (seconds per step, from its manifest) is printed beside it.
Kernels are compiled by an untimed refresh of 2,000 patrons first: every timed figure is warm.
The path each refresh took (incremental, whole_window: the state rebuilt, full_run) is printed.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import threading
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, machine  # noqa: E402

from lshjob.demo.generate import generate_events  # noqa: E402
from lshjob.ingest.spec import EventSpec  # noqa: E402
from lshjob.jobs import refresh as refresh_module  # noqa: E402
from lshjob.jobs.refresh import RefreshOptions, refresh_job  # noqa: E402
from lshjob.jobs.run import RunOptions, run_job  # noqa: E402
from lshjob.runtime.budget import current_bytes, peak_bytes, reset_peak  # noqa: E402

RUN_SPEC = EventSpec(entity="patron", element="title")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--patrons", type=int, default=100_000)
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--fractions", default="0.001,0.01,0.05,0.2")
    ap.add_argument("--days", type=int, default=30, help="the daily window (0: skip the daily case)")
    ap.add_argument("--skip-month", action="store_true", help="skip the next-month case")
    ap.add_argument("--data", choices=("library", "branches"), default="library",
                    help="library: lshjob demo's generator (12 months); branches: bench/common.py's branch "
                         "network (~40 loans a patron) with loan dates drawn uniformly over 2026-01-01..04-30")
    ap.add_argument("--share", type=float, default=None,
                    help="touched share that rebuilds the state (default: refresh.WHOLE_WINDOW_SHARE; 2: never)")
    args = ap.parse_args()
    if args.share is not None:
        refresh_module.WHOLE_WINDOW_SHARE = args.share
    started = time.perf_counter()
    if args.data == "library":
        events, _ = generate_events(args.patrons, 7)
        events = events.select("patron", "title", "borrowed_at")
    else:
        events = pl.read_parquet(branch_network_events(args.patrons)).rename({"entity": "patron", "element": "title"})
        minutes = np.random.default_rng(3).integers(0, 120 * 24 * 60, events.height)
        events = events.with_columns(borrowed_at=pl.lit(datetime(2026, 1, 1)) + pl.duration(minutes=pl.Series(minutes)))
    month = events["borrowed_at"].dt.month()
    print(f"machine: {machine()} (2 cores shared with other work: timings noisy, compare ratios)")
    print(f"command: python bench/refresh.py --patrons {args.patrons} --threshold {args.threshold} "
          f"--fractions {args.fractions} --days {args.days} --data {args.data}"
          + (f" --share {args.share}" if args.share is not None else ""))
    print(f"events: {events.height} loans of {args.patrons} patrons ({args.data})", flush=True)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)

        def measured(fn):
            # The jobs reset the kernel's high-water mark at each stage (its figure at the end is
            # the last stage's), so the peak is the largest of: the stages' own peaks (their
            # manifest), the mark at the end, and resident memory sampled every 5 ms between.
            reset_peak()
            stop, seen = threading.Event(), [current_bytes()]

            def sample() -> None:
                while not stop.wait(0.005):
                    seen[0] = max(seen[0], current_bytes())

            sampler = threading.Thread(target=sample, daemon=True)
            sampler.start()
            start = time.perf_counter()
            try:
                out = fn()
            finally:
                stop.set()
                sampler.join()
            seconds = time.perf_counter() - start
            stages = (out or {}).get("peak_memory_bytes") or {}
            return out, seconds, max([seen[0], peak_bytes(), *(int(v) for v in stages.values())])

        def refresh(batch: pl.DataFrame, name: str, store: str, spec: EventSpec, options: RefreshOptions):
            path = tmp / f"{name}.parquet"
            batch.write_parquet(path)
            return measured(lambda: refresh_job(path, tmp / store, spec, options, tmp / f"{store}-index"))

        def full(window: pl.DataFrame, plan: dict, name: str, store: str) -> tuple[float, int, bool]:
            path = tmp / f"{name}-window.parquet"
            window.write_parquet(path)
            run = RunOptions(threshold=args.threshold, top_k=20, perms=plan["perms"], bands=plan["bands"],
                             rows=plan["rows"], seed=plan["seed"], scheme=plan["scheme"])
            _, seconds, peak = measured(lambda: run_job(path, RUN_SPEC, run, tmp / f"{name}-full"))
            same = pl.read_parquet(tmp / f"{store}-index" / "neighbours.parquet").equals(
                pl.read_parquet(tmp / f"{name}-full" / "neighbours.parquet"))
            shutil.rmtree(tmp / f"{name}-full")
            path.unlink()
            return seconds, peak, same

        def case(name, batch, window, store, spec, options):
            manifest, seconds, peak = refresh(batch, name.replace(" ", "-"), store, spec, options)
            base, base_peak, same = full(window, manifest["plan"], name.replace(" ", "-"), store)
            r = manifest["refresh"]
            steps = {k: v for k, v in manifest["seconds"]["refresh"].items() if k != "total"}
            rows.append((name, batch.height, window.height, r["changed_entities"], seconds, base, peak, base_peak,
                         same, r["path"]))
            print(f"{name:<34} batch {batch.height:>9} window {window.height:>10} changed {r['changed_entities']:>8} "
                  f"refresh {seconds:7.2f} s  full {base:7.2f} s  ratio {seconds / base:5.3f}  "
                  f"peak {peak / 2**30:5.2f} / {base_peak / 2**30:5.2f} GiB  equal {same}  ({r['path']})")
            print("    refresh steps (s): " + ", ".join(f"{k} {v}" for k, v in steps.items()))
            print("    refresh steps' peak (GiB): " + ", ".join(
                f"{k} {v / 2**30:.2f}" for k, v in manifest["peak_memory_bytes"].items()))
            sys.stdout.flush()

        monthly = RefreshOptions(window=3, threshold=args.threshold, top_k=20)
        spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
        fill = events.filter(month <= 3)  # one batch: the store's first refresh builds its state
        warm = fill.filter(pl.col("patron").is_in(fill["patron"].unique().sort().head(2000).implode()))
        refresh(warm, "warm-up", "warm-up", spec, monthly)  # kernels compiled: every timed figure is warm
        delivered = [fill]
        case("first refresh (empty store, months 1-3)", fill, fill, "store", spec, monthly)
        rng = np.random.default_rng(1)
        patrons = events["patron"].unique().sort().to_numpy()
        titles = events["title"].unique().sort().to_numpy()
        newest = events.filter(month == 3)["borrowed_at"].max()
        for fraction in sorted((float(f) for f in args.fractions.split(",")), key=lambda f: (f != 0.01, f)):
            touched = rng.choice(patrons, size=max(1, int(len(patrons) * fraction)), replace=False)
            late = pl.DataFrame({"patron": touched, "title": rng.choice(titles, size=len(touched)),
                                 "borrowed_at": [newest] * len(touched)})
            delivered.append(late)
            case(f"{fraction:.1%} of patrons, no expiry", late, pl.concat(delivered), "store", spec, monthly)
        if not args.skip_month:
            nxt = events.filter(month == 4)
            delivered.append(nxt)
            window = pl.concat(delivered).filter(pl.col("borrowed_at").dt.month() >= 2)
            case("next month (a month expires)", nxt, window, "store", spec, monthly)
        shutil.rmtree(tmp / "store", ignore_errors=True)
        if args.days:
            daily = RefreshOptions(window=args.days, threshold=args.threshold, top_k=20)
            dspec = EventSpec(entity="patron", element="title", time="borrowed_at", period="day")
            first = events["borrowed_at"].min().replace(hour=0, minute=0, second=0, microsecond=0)
            day = (pl.col("borrowed_at") - pl.lit(first)).dt.total_days()
            fill = events.filter(day < args.days)
            _, seconds, _ = refresh(fill, "days", "daily", dspec, daily)
            print(f"fill: {args.days} days ({fill.height} loans) in {seconds:.1f} s (untimed)")
            following = events.filter(day >= args.days).select(day.alias("day"))["day"].min()  # a day with loans
            nxt = events.filter(day == following)
            window = events.filter((day > following - args.days) & (day <= following))
            case(f"next day ({args.days}-day window, "
                 f"{(first + timedelta(days=following)).date()})", nxt, window, "daily", dspec, daily)
    print(f"bench wall time {time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
