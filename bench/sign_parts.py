"""``lshjob sign`` under a memory budget: one part against key ranges, side by side.

    python bench/sign_parts.py --entities 10000000 --memory 4GB
    python bench/sign_parts.py --entities 1000000 --memory 4GB --periods

Runs the command twice in fresh processes on the branch network of bench/common.py: with
``--parts 1`` (every set in memory at once, whatever that takes; the signatures are written
a slice at a time either way) and with ``--memory M`` (key ranges when the sets need more
than half of what the slices in flight leave of M). With ``--periods``, each loan also gets
a branch and a day (seeded), and the command signs each (patron, branch, month) apart
(``--segment branch --time borrowed_on --period month``), which polars groups. The input is
read once first, so both runs find it in the page cache. Reports
wall clock, the process's peak resident memory (from the command's own ``--json`` summary)
and the seconds of each step; checks that both files hold the same signatures.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--memory", default="4GB")
    ap.add_argument("--perms", type=int, default=128)
    ap.add_argument("--periods", action="store_true", help="sign each (patron, branch, month) apart")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    path = branch_network_events(args.entities)
    keyed = []
    if args.periods:
        path = dated_copy(path)
        keyed = ["--segment", "branch", "--time", "borrowed_on", "--period", "month"]
    n_events = pl.scan_parquet(f"{path}/*.parquet").select(pl.len()).collect().item()
    for f in sorted(path.glob("*.parquet")):  # into the page cache: both runs read it warm
        f.read_bytes()
    rows = {}
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        for name, extra in (("one part (--parts 1)", ["--parts", "1"]),
                            (f"--memory {args.memory}", ["--memory", args.memory])):
            cmd = [sys.executable, "-m", "lshjob.cli.app", "sign", str(path), "--entity", "entity",
                   "--element", "element", "--perms", str(args.perms), "--out", f"{tmp}/{len(rows)}.parquet",
                   "--json", "--quiet", *keyed, *extra]
            start = time.perf_counter()
            done = subprocess.run(cmd, capture_output=True, text=True)
            wall = time.perf_counter() - start
            if done.returncode != 0:
                sys.exit(f"lshjob sign failed (exit {done.returncode}):\n{done.stderr[-3000:]}")
            rows[name] = (wall, json.loads(done.stdout))
        same = _same_rows(f"{tmp}/0.parquet", f"{tmp}/1.parquet")
    base = next(iter(rows.values()))[0]
    lines = [
        f"Machine: {machine()}",
        f"Data: {args.entities:,} entities, {n_events:,} events, k={args.perms}"
        + (", a set per (patron, branch, month): `" + " ".join(keyed) + "`" if keyed else ""),
        f"Command: `python bench/sign_parts.py --entities {args.entities} --memory {args.memory}"
        + (f" --perms {args.perms}" if args.perms != 128 else "") + (" --periods`" if keyed else "`"),
        "",
        "| run | parts | wall s | x one part | peak resident | ingest s | sign s | write s |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, (wall, s) in rows.items():
        sec = s["seconds"]
        lines.append(f"| {name} | {s['parts']} | {wall:.1f} | {wall / base:.2f} | "
                     f"{s['peak_memory_bytes'] / 2**30:.2f} GiB | {sec['ingest']:.1f} | {sec['sign']:.1f} "
                     f"| {sec['write']:.1f} |")
    lines += ["", f"Same signatures in both files: {same}."]
    finish(f"Signing under a memory budget, {args.entities:,} entities", "\n".join(lines), not args.no_write)


def dated_copy(path: Path) -> Path:
    """The loans of ``path`` with a ``branch`` (text: the patron's home branch of 40, one loan
    in ten at another) and a ``borrowed_on`` day of the first quarter of 2026 (seeded), cached
    beside it, a file at a time."""
    out = path.parent / f"{path.name}_dated"
    if (out / "_done").exists():
        return out
    out.mkdir(exist_ok=True)
    for i, f in enumerate(sorted(path.glob("*.parquet"))):
        loans = pl.read_parquet(f)
        rng = np.random.default_rng([7, i])
        loans.with_columns(
            branch=pl.format("Branch {}", pl.when(pl.Series(rng.random(loans.height)) < 0.9)
                             .then(pl.col("entity") % 40).otherwise(pl.Series(rng.integers(0, 40, loans.height)))),
            borrowed_on=pl.date(2026, 1, 1) + pl.duration(days=pl.Series(rng.integers(0, 90, loans.height))),
        ).write_parquet(out / f.name, compression="zstd")
    (out / "_done").touch()
    return out


def _same_rows(a: str, b: str, step: int = 500_000, columns: list[str] | None = None) -> bool:
    """Compare two signature files a slice at a time (at 10M entities each is 10 GB in memory)."""
    n = pl.scan_parquet(a).select(pl.len()).collect().item()
    if n != pl.scan_parquet(b).select(pl.len()).collect().item():
        return False

    def read(path: str, i: int) -> pl.DataFrame:
        frame = pl.scan_parquet(path)
        return (frame.select(columns) if columns else frame).slice(i, step).collect()

    return all(read(a, i).equals(read(b, i)) for i in range(0, n, step))


if __name__ == "__main__":
    main()
