"""DuckDB's memory beyond its ``memory_limit`` in the join stage.

    python bench/join_memory.py --rows 20000000 --limits 128MiB 256MiB 512MiB

Writes bucket rows of shared buckets (sizes 2 to 8, as the band stage writes them), then, in
a fresh process per limit, runs the join (:func:`lshjob.index.join.duckdb.candidate_pairs`) with that
``memory_limit`` and 2 threads and reports the process's resident memory before the join,
its peak during it (VmHWM after a reset), and the excess of peak - before over the limit.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import finish, machine  # noqa: E402

CHILD = """
import json, sys, time
from pathlib import Path
from lshjob.index.join import JoinSettings
from lshjob.index.join.duckdb import candidate_pairs
from lshjob.runtime.budget import current_bytes, peak_bytes, reset_peak
files, out, limit, threads = json.loads(sys.argv[1])
before = current_bytes()
reset_peak()
start = time.perf_counter()
got = candidate_pairs([Path(f) for f in files], Path(out),
                      JoinSettings(memory_limit=limit, temp_directory=out + ".spill", threads=threads), bands=16)
print(json.dumps({"before": before, "peak": peak_bytes(), "seconds": time.perf_counter() - start,
                  "pairs": got["candidate_pairs"]}))
"""


def bucket_rows(rows: int, folder: Path, bands: int = 16, seed: int = 0) -> list[Path]:
    rng = np.random.default_rng(seed)
    per_band = rows // bands
    files = []
    for band in range(bands):
        sizes = rng.integers(2, 9, per_band // 4)
        n = int(sizes.sum())
        frame = pl.DataFrame({"band": np.full(n, band, np.int32),
                              "bucket": np.repeat(rng.integers(0, 2**63, len(sizes)).astype(np.uint64), sizes),
                              "rep": rng.integers(0, rows // 8, n).astype(np.int64)})
        files.append(folder / f"band-{band:03d}.parquet")
        frame.write_parquet(files[-1])
    return files


def _error(stderr: str) -> str:
    line = next((x for x in stderr.splitlines() if "Error" in x and ":" in x), stderr.strip()[-200:])
    return line.strip()[:240]


def _mib(limit: str) -> int:
    assert limit.endswith("MiB"), "limits in MiB"
    return int(limit[:-3])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=20_000_000)
    ap.add_argument("--limits", nargs="+", default=["128MiB", "256MiB", "512MiB"])
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    lines = [f"Machine: {machine()}", f"Data: {args.rows:,} rows of shared buckets (sizes 2-8), 16 bands",
             f"Command: `python bench/join_memory.py --rows {args.rows} --limits {' '.join(args.limits)} "
             f"--threads {args.threads}`", "",
             "| memory_limit | resident before | peak during the join | peak - before | over the limit | seconds |",
             "| --- | ---: | ---: | ---: | ---: | ---: |"]
    mib = 2**20
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        files = [str(f) for f in bucket_rows(args.rows, Path(tmp))]
        for i, limit in enumerate(args.limits):
            payload = json.dumps([files, f"{tmp}/cand-{i}.parquet", limit, args.threads])
            done = subprocess.run([sys.executable, "-c", CHILD, payload], capture_output=True, text=True)
            if done.returncode != 0:
                lines.append(f"| {limit} | failed: {_error(done.stderr)} | | | | |")
                print(lines[-1], flush=True)
                continue
            got = json.loads(done.stdout)
            used = got["peak"] - got["before"]
            lines.append(f"| {limit} | {got['before'] / mib:.0f} MiB | {got['peak'] / mib:.0f} MiB "
                         f"| {used / mib:.0f} MiB "
                         f"| {(used - _mib(limit) * mib) / mib:+.0f} MiB | {got['seconds']:.1f} |")
            print(lines[-1], flush=True)
    finish("DuckDB's memory beyond its limit (join)", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
