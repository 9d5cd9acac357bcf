"""Scale: the whole run at a given size, per-stage time and peak memory, against a floor pass.

    python bench/scale.py --entities 1000000 [--scheme kperm|oph] [--memory 8GB]

Generates a branch network once into bench/cache/ (bench/common.py branch_network_events:
log-normal set sizes, mean ~40, power-law titles per branch, 10% perturbed copies), times a
floor pass (polars reads the events, one 64-bit hash per event, minimum per entity), runs
``lshjob run`` at threshold 0.5 in a fresh process, and audits recall on a sample with
``lshjob audit``.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine  # noqa: E402


def _f(x) -> str:
    return "n/a" if x is None else f"{x:.4f}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--entities", type=int, default=100_000)
    ap.add_argument("--scheme", default="kperm")
    ap.add_argument("--perms", type=int, default=128)
    ap.add_argument("--memory", default=None)
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--audit", type=int, default=2000, help="entities the audit samples (0: no audit)")
    ap.add_argument("--repeat", type=int, default=1, help="runs of lshjob; the fastest is reported")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    start = time.perf_counter()
    path = branch_network_events(args.entities)
    generated = time.perf_counter() - start
    n_events = pl.scan_parquet(f"{path}/*.parquet").select(pl.len()).collect().item()

    floors, floor_cpu = [], []

    def floor_pass() -> None:
        start, cpu = time.perf_counter(), _cpu(resource.RUSAGE_SELF)
        pl.scan_parquet(f"{path}/*.parquet").group_by("entity").agg(pl.col("element").hash(1).min()).collect()
        floors.append(time.perf_counter() - start)
        floor_cpu.append(_cpu(resource.RUSAGE_SELF) - cpu)

    with tempfile.TemporaryDirectory(dir=Path(__file__).parent / "cache") as tmp:
        cmd = [sys.executable, "-m", "lshjob.cli.app", "run", str(path), "--entity", "entity", "--element", "element",
               "--threshold", str(args.threshold), "--scheme", args.scheme, "--perms", str(args.perms),
               "--out", f"{tmp}/idx", "--json", "--quiet"]
        if args.memory:
            cmd += ["--memory", args.memory]
        walls, run_cpu, m = [], [], None
        for _ in range(args.repeat):
            for _ in range(2):  # the floor is short and noisy: two passes beside each run, best of all
                floor_pass()
            start, cpu = time.perf_counter(), _cpu(resource.RUSAGE_CHILDREN)
            done = subprocess.run(cmd, capture_output=True, text=True)
            run_cpu.append(_cpu(resource.RUSAGE_CHILDREN) - cpu)
            if done.returncode != 0:
                sys.exit(f"lshjob run failed (exit {done.returncode}):\n{done.stderr[-3000:]}")
            walls.append(time.perf_counter() - start)
            if walls[-1] == min(walls):
                m = json.loads(done.stdout)
        wall = min(walls)
        floor = min(floors)
        audit = None
        if args.audit > 0:
            audit_cmd = [sys.executable, "-m", "lshjob.cli.app", "audit", f"{tmp}/idx",
                         "--sample", str(args.audit), "--json"]
            audit = json.loads(subprocess.run(audit_cmd + (["--memory", args.memory] if args.memory else []),
                                              check=True, capture_output=True, text=True).stdout)

    plan = m["plan"]
    lines = [
        f"Machine: {machine()}",
        f"Data: {args.entities:,} entities, {n_events:,} events (generated in {generated:.0f} s, cached)",
        f"Command: `python bench/scale.py --entities {args.entities} --scheme {args.scheme} --perms {args.perms}"
        + (f" --memory {args.memory}" if args.memory else "")
        + (f" --repeat {args.repeat}" if args.repeat > 1 else "") + "`",
        f"Plan: {plan['mode']}, k={plan['perms']}, b={plan['bands']}, r={plan['rows']}, predicted recall "
        f"{plan['predicted']['expected_recall']:.3f}; memory budget {m['memory_budget_bytes'] / 2**30:.1f} GiB",
        "",
        "| stage | seconds | peak resident memory |",
        "| --- | ---: | ---: |",
    ]
    order = ["ingest", "count", "collapse", "plan", "sign", "band", "join", "verify", "publish", "write"]
    for stage in [s for s in order if s in m["seconds"]]:
        secs = m["seconds"][stage]
        peak = m["peak_memory_bytes"].get(stage)
        lines.append(f"| {stage} | {secs:.2f} | {'' if peak is None else f'{peak / 2**30:.2f} GiB'} |")
    c = m["counts"]
    lines += [
        f"| total (process wall clock{'' if args.repeat == 1 else f', best of {args.repeat}'}) | {wall:.2f} "
        f"| {max(m['peak_memory_bytes'].values()) / 2**30:.2f} GiB |",
        "",
        f"Counts: parts {c.get('parts', 1)}, bucket rows {c['bucket_rows']:,}, "
        f"candidates {c['candidate_pairs']:,}, verified {c['verified_pairs']:,}, published {c['published_rows']:,}.",
        f"Floor pass {floor:.2f} s (best of {len(floors)}, two beside each run: "
        f"{', '.join(f'{x:.2f}' for x in floors)}); "
        f"run / floor = {wall / floor:.1f}x. CPU time (user + system, both cores; steadier than the "
        f"wall clock on this machine): run {min(run_cpu):.2f} s, floor {min(floor_cpu):.2f} s, "
        f"ratio {min(run_cpu) / min(floor_cpu):.1f}x (best of each).",
    ]
    if audit is not None:
        lines.append(
        f"Audit ({audit['sampled_entities']} entities against {audit['compared_against']}, "
        f"{audit['true_pairs']} true pairs): recall {_f(audit['recall'])}, S-curve predicts "
        f"{_f(audit['predicted_recall'])}; over {audit['distinct_set_pairs']} distinct pairs of different sets "
        f"{_f(audit['distinct_recall'])} vs {_f(audit['distinct_predicted'])} +/- {_f(audit['distinct_se'])} "
        f"predicted; wrong pairs {audit['wrong_pairs']}. The audit read the sets in {audit['parts']} part(s), "
        f"peak {audit['peak_memory_bytes'] / 2**30:.2f} GiB.")
    finish(f"Scale, {args.entities:,} entities, {args.scheme}", "\n".join(lines), not args.no_write)


def _cpu(who: int) -> float:
    usage = resource.getrusage(who)
    return usage.ru_utime + usage.ru_stime


if __name__ == "__main__":
    main()
