"""``lshjob merge`` under a memory budget: folding two signature files by entity key ranges.

    python bench/merge_parts.py --entities 10000000 --memory 4GB [--one-part]

Signs the branch network of bench/common.py once (``lshjob sign --memory M``), then folds
the file with itself (two inputs, every entity twice) with ``lshjob merge --memory M``, and
with ``--one-part`` also with ``--parts 1`` (every row in memory at once: about 3 x 8k bytes a
row, so only at sizes that fit). Reports wall clock and the peak resident memory from each
command's ``--json`` summary, and checks that the folded file equals the signed one (the
minimum of a signature with itself is itself).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine  # noqa: E402
from sign_parts import _same_rows  # noqa: E402


def _lshjob(*args: str) -> tuple[float, dict]:
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", *args, "--json", "--quiet"],
                          capture_output=True, text=True)
    if done.returncode != 0:
        sys.exit(f"lshjob {args[0]} failed (exit {done.returncode}):\n{done.stderr[-3000:]}")
    return time.perf_counter() - start, json.loads(done.stdout)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--memory", default="4GB")
    ap.add_argument("--one-part", action="store_true", help="also merge with every row in memory")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    path = branch_network_events(args.entities)
    lines = [
        f"Machine: {machine()}",
        f"Data: {args.entities:,} entities, k=128; two inputs (the signed file twice), "
        f"{2 * args.entities:,} rows in",
        f"Command: `python bench/merge_parts.py --entities {args.entities} --memory {args.memory}"
        + (" --one-part" if args.one_part else "") + "`",
        "",
        "| run | parts | wall s | peak resident |",
        "| --- | ---: | ---: | ---: |",
    ]
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        sigs = f"{tmp}/sigs.parquet"
        _lshjob("sign", str(path), "--entity", "entity", "--element", "element", "--memory", args.memory, "--out", sigs)
        runs = [(f"--memory {args.memory}", ["--memory", args.memory])]
        if args.one_part:
            runs.append(("one part (--parts 1)", ["--parts", "1"]))
        same = []
        for i, (name, extra) in enumerate(runs):
            out = f"{tmp}/merged-{i}.parquet"
            wall, s = _lshjob("merge", sigs, sigs, "--out", out, *extra)
            lines.append(f"| {name} | {s['parts']} | {wall:.1f} | {s['peak_memory_bytes'] / 2**30:.2f} GiB |")
            same.append(_same_rows(sigs, out, columns=["entity", "signature"]))
            Path(out).unlink()
    lines += ["", f"Folded file equals the signed file (entity, signature): {all(same)}."]
    finish(f"Merging under a memory budget, {args.entities:,} entities", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
