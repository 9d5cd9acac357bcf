"""How well ``lshjob drift`` finds the library demo's planted drifters, per seed.

Per seed: the demo (``generate_events``), signed per patron and month (kperm, k=128) with the
element asked for (``series``: the demo's documented recipe; ``genre``: the coarse element
the demo used before, for comparison), then ``drift_file`` at each history and z asked for.
Scored against planted.parquet (kind drifter, changed_at): a drifter is found when a row at
or after its change month is flagged; any other patron flagged is a false alarm (precision
over all patrons). Summer readers: non-drifting patrons with a summer title; their rows in
June to August flagged, against the other months' rows of non-drifters.

Usage: python bench/drift_demo.py --patrons 1200 --seeds 2026 7 11 3 4 5 --history 3 6 --z 3.5 [--write]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import polars as pl

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.common import finish, machine  # noqa: E402
from lshjob.demo.generate import generate_events  # noqa: E402
from lshjob.ingest.spec import EventSpec  # noqa: E402
from lshjob.jobs.drift import drift_file  # noqa: E402
from lshjob.jobs.sign import sign_file  # noqa: E402
from lshjob.sign.signatures import SignatureParams  # noqa: E402

SUMMER = (6, 7, 8)


def score(rows: pl.DataFrame, events: pl.DataFrame, planted: pl.DataFrame) -> str:
    drifters = planted.filter(pl.col("kind") == "drifter").select(entity="patron", changed_at="changed_at")
    truth = set(drifters["entity"])
    flagged = set(rows.filter("flagged")["entity"])
    found = set(rows.filter("flagged").join(drifters, on="entity").filter(pl.col("period") >= pl.col("changed_at"))
                ["entity"])
    precision, recall = len(flagged & truth) / max(1, len(flagged)), len(found) / max(1, len(truth))
    summer_readers = set(events.filter(pl.col("genre") == "summer")["patron"]) - truth
    honest = rows.filter(pl.col("score").is_not_null() & ~pl.col("entity").is_in(list(truth)))
    in_summer = pl.col("period").dt.month().is_in(SUMMER)
    summer = honest.filter(in_summer & pl.col("entity").is_in(list(summer_readers)))["flagged"]
    other = honest.filter(~in_summer)["flagged"]
    return (f"{precision:.2f} / {recall:.2f} | {len(truth)} | {len(flagged - truth)} "
            f"| {summer.sum()} of {summer.len()} vs {other.sum()} of {other.len()} |")


def run_seed(patrons: int, seed: int, elements, histories, zs, folder: Path) -> list[str]:
    events, planted = generate_events(patrons, seed)
    src = folder / f"loans-{seed}.parquet"
    events.write_parquet(src)
    lines = []
    for element in elements:
        sigs = folder / f"monthly-{seed}-{element}.parquet"
        spec = EventSpec(entity="patron", element=element, time="borrowed_at", period="month")
        sign_file(src, sigs, spec, SignatureParams())
        for history in histories:
            for z in zs:
                started = time.perf_counter()
                rows, _ = drift_file(sigs, folder / f"drift-{seed}.parquet", history=history, z=z)
                seconds = time.perf_counter() - started
                cells = score(rows, events, planted)
                lines.append(f"| {seed} | {element} | {history} | {z} | {cells} {seconds:.2f} |")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--patrons", type=int, default=1200)
    parser.add_argument("--seeds", type=int, nargs="+", default=[2026, 7, 11, 3, 4, 5])
    parser.add_argument("--elements", nargs="+", default=["series", "genre"])
    parser.add_argument("--history", type=int, nargs="+", default=[3, 6])
    parser.add_argument("--z", type=float, nargs="+", default=[3.5])
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    lines = ["| seed | element | --history | --z | P / R | drifters | false alarms (patrons) "
             "| summer readers' June-August rows flagged vs other months' rows (non-drifters) | drift s |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    with tempfile.TemporaryDirectory() as tmp:
        for seed in args.seeds:
            lines += run_seed(args.patrons, seed, args.elements, args.history, args.z, Path(tmp))
    report = "\n".join([
        f"Machine: {machine()} (shared with other jobs; timings noisy)",
        f"Data: lshjob demo, {args.patrons} patrons, seeds {' '.join(map(str, args.seeds))}; "
        "signed per patron and month (kperm, k=128) by the element named",
        f"Command: `python bench/drift_demo.py --patrons {args.patrons} --seeds {' '.join(map(str, args.seeds))} "
        f"--elements {' '.join(args.elements)} --history {' '.join(map(str, args.history))} "
        f"--z {' '.join(map(str, args.z))}`",
        "P / R: precision over all patrons / recall of planted drifters (found at or after their change month).",
        "", *lines])
    finish(f"Drift on the library demo, {args.patrons} patrons", report, args.write)


if __name__ == "__main__":
    main()
