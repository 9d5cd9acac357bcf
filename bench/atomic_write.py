"""What flushing a signature file to disk costs (lshjob/core/atomic.py, ``fsync``).

    python bench/atomic_write.py [--entities 1000000] [--perms 128] [--repeat 3]

Writes one signature table of random signatures with ``write_signatures`` (temporary name,
then rename), alternately with the flush to disk before the rename and without it (the
flush replaced by nothing in this process), and reports each time.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import finish, machine  # noqa: E402

from lshjob.core import atomic  # noqa: E402
from lshjob.sign.signatures import write_signatures  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--perms", type=int, default=128)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n, k = args.entities, args.perms
    table = pl.DataFrame({"entity": np.arange(n), "set_size": np.full(n, 40, dtype=np.int32),
                          "signature": rng.integers(0, 2**63, (n, k), dtype=np.uint64)})
    flush = atomic._fsync_file
    times: dict[str, list[float]] = {"with fsync": [], "without": []}
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent) as tmp:
        out = Path(tmp) / "signatures.parquet"
        for _ in range(args.repeat):
            for mode in times:
                atomic._fsync_file = flush if mode == "with fsync" else (lambda path: None)
                start = time.perf_counter()
                write_signatures(table, out, {"k": k})
                times[mode].append(time.perf_counter() - start)
        size = out.stat().st_size
    atomic._fsync_file = flush
    lines = [
        f"Machine: {machine()}, load average {os.getloadavg()[0]:.1f} at the end (a shared machine)",
        f"Data: {n:,} random signatures, k={k}, file {size / 2**20:,.0f} MiB (snappy)",
        f"Command: `python bench/atomic_write.py --entities {n} --perms {k} --repeat {args.repeat}`",
        "",
        "| write | seconds, each round | median |",
        "| --- | --- | ---: |",
        *(f"| {mode} | {', '.join(f'{t:.2f}' for t in ts)} | {statistics.median(ts):.2f} |"
          for mode, ts in times.items()),
    ]
    finish("Atomic write: the flush to disk of a signature file", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
