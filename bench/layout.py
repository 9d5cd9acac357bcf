"""Before and after a refactoring: ``lshjob run`` from two source trees, side by side.

    python bench/layout.py --baseline /path/to/old/checkout --entities 1000000 --repeat 3

Runs the same command on the same generated events (bench/common.py branch_network_events)
from this tree and from the baseline tree (an older checkout, put first on PYTHONPATH),
alternating the two so that a slow phase of the machine hits both, and reports the fastest
wall time of each, the ratio, and whether the published neighbours are the same rows. The
baseline's command module is found by trying ``lshjob.cli.app`` then ``lshjob.cli``.
Runs outside the repository so that ``python -m`` does not pick the working tree.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, lshjob_command, machine  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


def _run(tree: Path, events: Path, out: Path, threshold: float) -> tuple[float, dict]:
    cmd = [*lshjob_command(tree), "run", str(events), "--entity", "entity", "--element", "element",
           "--threshold", str(threshold), "--out", str(out), "--json", "--quiet"]
    start = time.perf_counter()
    done = subprocess.run(cmd, cwd=out.parent, capture_output=True, text=True)
    wall = time.perf_counter() - start
    if done.returncode:
        raise SystemExit(f"{tree}: exit {done.returncode}: {done.stderr[-2000:]}")
    return wall, json.loads(done.stdout)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--baseline", type=Path, required=True, help="an older checkout of lshjob")
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--label", default="", help="what the baseline is (a commit), for RESULTS.md")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    events = branch_network_events(args.entities)
    trees = {"baseline": args.baseline.resolve(), "this tree": ROOT}
    best: dict[str, float] = {}
    stages: dict[str, dict] = {}
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        tmp = Path(tmp)
        for name, tree in trees.items():  # one untimed run each: compiled kernels into the cache
            _run(tree, events, tmp / f"warm-{name.replace(' ', '-')}", args.threshold)
        for r in range(args.repeat):
            for name, tree in trees.items():
                wall, manifest = _run(tree, events, tmp / f"{name.replace(' ', '-')}-{r}", args.threshold)
                if wall < best.get(name, float("inf")):
                    best[name] = wall
                    stages[name] = {k: round(v, 2) for k, v in (manifest.get("seconds") or {}).items()
                                    if isinstance(v, (int, float))}
        frames = {name: pl.read_parquet(tmp / f"{name.replace(' ', '-')}-0" / "neighbours.parquet")
                  for name in trees}
        cols = sorted(set(frames["baseline"].columns) & set(frames["this tree"].columns))
        same = frames["baseline"].select(cols).sort(cols).equals(frames["this tree"].select(cols).sort(cols))
    ratio = best["this tree"] / best["baseline"]
    lines = [
        f"machine: {machine()}",
        f"command: python bench/layout.py --baseline {args.label or args.baseline} --entities {args.entities} "
        f"--repeat {args.repeat}",
        f"events: branch network, {args.entities:,} entities, threshold {args.threshold}; warm (kernels cached)",
        "",
        "| tree | best wall s | per stage (s) |",
        "| --- | --- | --- |",
        *(f"| {name} | {best[name]:.2f} | {stages[name]} |" for name in trees),
        "",
        f"this tree / baseline: {ratio:.3f}; neighbours identical: {same}",
    ]
    finish("Refactoring: before and after, side by side", "\n".join(lines), write=not args.no_write)


if __name__ == "__main__":
    main()
