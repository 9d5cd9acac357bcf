"""Benchmark of ``lshjob drift``: entities x monthly periods, drift's time against reading the
signatures (the same blocks of the file decoded into signature matrices, nothing computed).

The signature file is generated directly (no events): each entity has a stable signature and
each month keeps about half of its positions and draws the others afresh, so consecutive
months agree on about a quarter of the positions or more, as a reader with a steady core does.
Cached under bench/cache/.

Usage: python bench/drift.py --entities 1000000 --periods 12 --perms 128 [--write]
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.common import CACHE, machine  # noqa: E402
from lshjob.jobs.drift import BLOCK_ROWS, drift_file  # noqa: E402
from lshjob.runtime.budget import peak_bytes  # noqa: E402
from lshjob.sign.signatures import SignatureParams, signature_array, signature_column, signature_metadata  # noqa: E402
from lshjob.sign.streaming import write_streamed  # noqa: E402

BLOCK_ENTITIES = 20_000


def signature_file(entities: int, periods: int, k: int, seed: int = 0) -> Path:
    CACHE.mkdir(exist_ok=True)
    path = CACHE / f"drift_{entities}_{periods}_{k}_{seed}.parquet"
    if path.exists():
        return path
    months = [dt.date(2026 + m // 12, m % 12 + 1, 1) for m in range(periods)]
    meta = signature_metadata(SignatureParams(perms=k), ["entity", "period"], period_unit="month")

    def blocks():
        rng = np.random.default_rng(seed)
        for lo in range(0, entities, BLOCK_ENTITIES):
            n = min(BLOCK_ENTITIES, entities - lo)
            base = rng.integers(0, 2**63, (n, 1, k), dtype=np.uint64)
            fresh = rng.integers(0, 2**63, (n, periods, k), dtype=np.uint64)
            keep = rng.random((n, periods, k)) < 0.5
            matrix = np.where(keep, base, fresh).reshape(n * periods, k)
            del fresh, keep
            yield pl.DataFrame({
                "entity": np.repeat(np.arange(lo, lo + n, dtype=np.int64), periods),
                "period": pl.Series(np.tile(np.array(months, dtype="datetime64[D]"), n)).cast(pl.Date),
            }).with_columns(signature_column(matrix), set_size=pl.lit(20, dtype=pl.UInt32))

    write_streamed(blocks(), path, meta)
    return path


def read_blocks(path: Path, k: int) -> int:
    """Decode the file's signatures block by block, as drift reads them; return the rows."""
    rows = pl.scan_parquet(path).select(pl.len()).collect().item()
    frame = pl.scan_parquet(path).select("signature")
    total = 0
    for lo in range(0, rows, BLOCK_ROWS):
        matrix = signature_array(frame.slice(lo, BLOCK_ROWS).collect(), k)
        total += matrix.shape[0]
        del matrix
    return total


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--entities", type=int, default=1_000_000)
    parser.add_argument("--periods", type=int, default=12)
    parser.add_argument("--perms", type=int, default=128)
    parser.add_argument("--write", action="store_true", help="Append the results to bench/RESULTS.md.")
    args = parser.parse_args()
    started = time.perf_counter()
    path = signature_file(args.entities, args.periods, args.perms)
    made = time.perf_counter() - started
    made = f"made in {made:.0f} s" if made > 1 else "made by an earlier run"
    out = CACHE / "drift_out.parquet"
    drift_file(signature_file(1000, args.periods, args.perms), out)  # compile the kernel first (cached after)
    t0 = time.perf_counter()
    _, summary = drift_file(path, out)
    drift_s = time.perf_counter() - t0
    drift_peak = peak_bytes()
    t0 = time.perf_counter()
    rows = read_blocks(path, args.perms)
    read_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    pl.read_parquet(path, columns=["entity", "period", "set_size"])
    keys_s = time.perf_counter() - t0
    size = path.stat().st_size / 2**30
    command = f"python bench/drift.py --entities {args.entities} --periods {args.periods} --perms {args.perms}"
    text = "\n".join([
        f"## Drift, {args.entities:,} entities x {args.periods} months ({dt.date.today()})",
        "",
        f"Machine: {machine()}",
        f"Data: {rows:,} signature rows, k={args.perms}, {size:.1f} GiB of Parquet (generated: each month keeps half "
        f"of a stable signature's positions, so no entity drifts; {made}, cached)",
        f"Command: `{command}`",
        "",
        "| run | seconds | rows/s | time vs reading the signatures |",
        "| --- | ---: | ---: | ---: |",
        f"| read the signatures (the same blocks, decoded to matrices) | {read_s:.1f} | {rows / read_s:,.0f} | 1.00x |",
        f"| read the key columns only | {keys_s:.1f} | {rows / keys_s:,.0f} | {keys_s / read_s:.2f}x |",
        f"| lshjob drift (read, compare, score, write) | {drift_s:.1f} | {rows / drift_s:,.0f} "
        f"| {drift_s / read_s:.2f}x |",
        "",
        f"drift takes {drift_s / read_s:.2f}x the time of reading the signatures (target: at most 2x); "
        f"peak memory {drift_peak / 2**30:.2f} GiB; {summary['flagged']:,} rows flagged.",
        "",
    ])
    print(text)
    if args.write:
        with open(Path(__file__).parent / "RESULTS.md", "a") as results:
            results.write("\n" + text)


if __name__ == "__main__":
    main()
