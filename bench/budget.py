"""Memory budget: each stage's peak resident memory against ``--memory``, at several budgets.

    python bench/budget.py --entities 1000000 --memory 512MiB 1GB 2GB

Runs ``lshjob run`` (threshold 0.5) on the branch network of bench/common.py once per budget,
each in a fresh process (a first run compiles the kernels, whose LLVM memory is not the
run's), and tabulates the manifest's ``peak_memory_bytes`` per stage (the kernel's high-water
mark, reset at each stage) against the budget. A run
refused before the work is shown with its message.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine  # noqa: E402

MEASURE = ("import json, resource, subprocess, sys; "
           "done = subprocess.run(sys.argv[1:], capture_output=True, text=True); "
           "print(json.dumps({'code': done.returncode, 'peak': resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss "
           "* 1024, 'stdout': done.stdout, 'stderr': done.stderr[-2000:]}))")
ORDER = ["ingest", "count", "collapse", "plan", "sign", "band", "join", "verify", "publish"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=1_000_000)
    ap.add_argument("--memory", nargs="+", default=["512MiB", "1GB", "2GB"])
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    path = branch_network_events(args.entities)
    runs = {}
    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        base = [sys.executable, "-m", "lshjob.cli.app", "run", str(path), "--entity", "entity", "--element", "element",
                "--threshold", str(args.threshold), "--json", "--quiet"]
        subprocess.run(base + ["--out", f"{tmp}/warm", "--memory", "2GB"], capture_output=True)
        for memory in args.memory:
            cmd = base + ["--out", f"{tmp}/idx-{memory}", "--memory", memory]
            done = json.loads(subprocess.run([sys.executable, "-c", MEASURE, *cmd], capture_output=True,
                                             text=True).stdout)
            runs[memory] = done
    mib = 2**20
    lines = [f"Machine: {machine()}",
             f"Data: {args.entities:,} entities (bench/common.py branch network), threshold {args.threshold}",
             f"Command: `python bench/budget.py --entities {args.entities} --memory {' '.join(args.memory)}`", ""]
    lines += ["| stage | " + " | ".join(f"`--memory {m}`" for m in args.memory) + " |",
              "| --- |" + " ---: |" * len(args.memory)]
    manifests = {m: json.loads(r["stdout"]) if r["code"] == 0 else None for m, r in runs.items()}
    stages = [s for s in ORDER if any(m and s in m["peak_memory_bytes"] for m in manifests.values())]
    for stage in stages:
        cells = []
        for memory in args.memory:
            m = manifests[memory]
            peak = m["peak_memory_bytes"].get(stage) if m else None
            cells.append("" if peak is None else f"{peak / mib:.0f} MiB")
        lines.append(f"| {stage} | " + " | ".join(cells) + " |")
    lines.append("| highest stage | " + " | ".join(f"{max(manifests[x]['peak_memory_bytes'].values()) / mib:.0f} MiB"
                                                     if manifests[x] else f"exit {runs[x]['code']}"
                                                     for x in args.memory) + " |")
    lines.append("| budget | " + " | ".join(f"{manifests[x]['memory_budget_bytes'] / mib:.0f} MiB"
                                              if manifests[x] else "" for x in args.memory) + " |")
    lines.append("| parts | " + " | ".join(str(manifests[x]["counts"]["parts"]) if manifests[x] else ""
                                             for x in args.memory) + " |")
    lines.append("| seconds | " + " | ".join(f"{manifests[x]['seconds']['total']:.1f}" if manifests[x] else ""
                                               for x in args.memory) + " |")
    for memory in args.memory:
        if not manifests[memory]:
            lines.append(f"\n`--memory {memory}`: exit {runs[memory]['code']}: {runs[memory]['stderr'].strip()}")
    m = next((x for x in manifests.values() if x), None)
    if m:
        c = m["counts"]
        lines.append(f"\nCounts: bucket rows {c['bucket_rows']:,}, shared {c.get('shared_bucket_rows', 0):,}, "
                     f"candidates {c['candidate_pairs']:,}, verified {c['verified_pairs']:,}.")
    finish(f"Memory budget, {args.entities:,} entities", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
