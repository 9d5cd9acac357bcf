"""What checking the ``--count`` column costs: every count a finite number >= 0, nulls
counted like null keys; and what looking for nested NDJSON keys costs.

    python bench/count_checks.py --rows 2000000

The same integer events with an integer count column and with a float one, as Parquet
and as CSV. ``open_events`` (ingest's checks; the Parquet footers stand in for the
statistics pass, so the count column is read once more on its own) is timed with the
count checks and with them replaced by nothing, in the same process; the same events as
NDJSON (text keys, no count) with the nested-key check on and off. Each figure is the
best of ``--repeat`` runs, wall clock and CPU time of the process.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import best, finish, machine  # noqa: E402

import lshjob.ingest.spec as ingest  # noqa: E402
from lshjob import EventSpec  # noqa: E402
from lshjob.ingest.loading import open_events  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-write", action="store_true", help="print only; do not append to RESULTS.md")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n = args.rows
    patrons, titles, loans = rng.integers(0, n // 20, n), rng.integers(0, n // 10, n), rng.integers(1, 5, n)
    lines = [f"Machine: {machine()}",
             f"Command: `python bench/count_checks.py --rows {n} --repeat {args.repeat}`", "",
             "| input | count checks | wall s | CPU s |", "| --- | --- | ---: | ---: |"]
    checked, not_a_count = ingest._check_counts, ingest.not_a_count
    spec = EventSpec(entity="patron", element="title", count="loans")
    with tempfile.TemporaryDirectory() as tmp:
        for kind, values in (("integer", loans), ("float", loans.astype(np.float64))):
            frame = pl.DataFrame({"patron": patrons, "title": titles, "loans": values})
            for fmt in ("parquet", "csv"):
                path = Path(tmp) / f"{kind}.{fmt}"
                getattr(frame, f"write_{fmt}")(path)
                for on in (True, False):
                    ingest._check_counts = checked if on else (lambda *a: None)
                    ingest.not_a_count = not_a_count if on else (lambda name, schema=None: pl.lit(False))
                    wall, cpu = best(lambda path=path: open_events(path, spec), args.repeat)
                    lines.append(f"| {kind} count, {fmt} | {'on' if on else 'off'} | {wall:.3f} | {cpu:.3f} |")
        ingest._check_counts, ingest.not_a_count = checked, not_a_count
        nested = ingest.looks_nested
        path = Path(tmp) / "text.ndjson"
        pl.DataFrame({"patron": [f"p{p}" for p in patrons], "title": [f"t{t}" for t in titles]}).write_ndjson(path)
        plain = EventSpec(entity="patron", element="title")
        for on in (True, False):
            ingest.looks_nested = nested if on else (lambda keys: pl.lit(False))
            wall, cpu = best(lambda path=path: open_events(path, plain), args.repeat)
            lines.append(f"| text keys, ndjson (nested-key check) | {'on' if on else 'off'} | {wall:.3f} | {cpu:.3f} |")
        ingest.looks_nested = nested
    finish(f"Count and nested-key checks, {n:,} rows", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
