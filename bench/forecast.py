"""Forecast from a 10% sample to the full size, beside the measured full run.

    python bench/forecast.py --runs flat:1000000 longtail:300000

For each shape: (1) a tenth of the entities, drawn uniformly, and a quarter of that sample
(nested) are indexed with ``lshjob run`` (warm); (2) ``lshjob plan --sample SAMPLE --entities N
--events E --history SMALL_RUN --history SAMPLE_RUN`` forecasts the full run by scaling the
sample's runs (lshjob/plan/scaling.py; E: the full data's event count, which a user knows;
the cost model, for the runners-up: a ``lshjob calibrate`` run first with ``--calibrate``, else
the shipped default); (3) ``lshjob run`` on the full data, warm, is measured. The table gives
forecast / measured for total seconds and peak memory (the largest per-stage peak of the
manifest), and per stage.

Shapes: ``flat`` = bench/common.py branch network (log-normal set sizes, each patron with a
bounded number of look-alikes); ``longtail`` = bench/common.py zipf_events (Zipf 1.2 element
popularity, half the sets 1-5 popular elements, a fifth near-copies: candidates grow faster
than N). Whole processes, wall clock; one untimed warm-up run first (kernels compiled); each of
the sample's runs is the fastest of ``--sample-repeat`` (default 3: on a shared machine, the one
least slowed by others), the full run the fastest of ``--repeat``. The samples, the runs'
manifests and the plan are kept under bench/cache/forecast/SHAPE-N; ``--replan`` forecasts
again from them (no runs): a change of the forecast alone is compared on the same
measurements.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import branch_network_events, finish, machine, zipf_events  # noqa: E402

THRESHOLD = 0.5
CACHE_OUT = Path(__file__).parent / "cache" / "forecast"  # the runs' manifests and the plan, to look into


def _lshjob(*args: str, env: dict | None = None) -> dict:
    done = subprocess.run([sys.executable, "-m", "lshjob", *args, "--json", "--quiet"], capture_output=True,
                          text=True, env=env)
    if done.returncode:
        raise SystemExit(f"lshjob {args[0]}: exit {done.returncode}: {done.stderr[-2000:]}")
    return json.loads(done.stdout)


MEMORY: list[str] = []  # --memory (and --max-candidates) given to the runs and the plan, when told one


def _run(events: Path, out: Path, repeat: int = 1) -> dict:
    """The fastest of ``repeat`` runs (by total seconds): the machine is shared, spikes are others'."""
    runs = [_lshjob("run", str(events), "--entity", "entity", "--element", "element", "--threshold",
                    str(THRESHOLD), "--out", str(out), *MEMORY) for _ in range(repeat)]
    return min(runs, key=lambda m: m["seconds"]["total"])


def _events(shape: str, entities: int) -> Path:
    return branch_network_events(entities) if shape == "flat" else zipf_events(entities)


def _sample(events: Path, share: float, out: Path, seed: int = 0) -> Path:
    frame = pl.read_parquet(_files(events), columns=["entity", "element"])
    keys = frame["entity"].unique().sort().to_numpy()
    picked = np.random.default_rng(seed).choice(keys, size=max(2, int(len(keys) * share)), replace=False)
    frame.filter(pl.col("entity").is_in(pl.Series(picked).implode())).write_parquet(out)
    return out


def _files(path: Path) -> str:
    return str(path / "*.parquet") if path.is_dir() else str(path)


def _peak(manifest: dict) -> int:
    return max(manifest["peak_memory_bytes"].values())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", nargs="+", default=["flat:1000000", "longtail:300000"],
                    help="shape:entities, shape flat or longtail")
    ap.add_argument("--share", type=float, default=0.1, help="the sample's share of the entities")
    ap.add_argument("--repeat", type=int, default=1, help="runs of each measurement; the fastest is kept")
    ap.add_argument("--sample-repeat", type=int, default=3,
                    help="runs of each of the sample's runs (cheap); the fastest is kept: the least loaded")
    ap.add_argument("--calibrate", action="store_true", help="run lshjob calibrate first (the runners-up's costs)")
    ap.add_argument("--small", type=float, default=0.25, help="the smaller run's share of the sample (nested)")
    ap.add_argument("--memory", help="memory budget of the runs and the forecast, e.g. 14GB (default: the run's)")
    ap.add_argument("--replan", action="store_true",
                    help="no runs: forecast again from the samples and runs kept under bench/cache/forecast")
    ap.add_argument("--max-candidates", help="--max-candidates of the runs and the forecast, e.g. 1e10")
    ap.add_argument("--forecast-only", action="store_true", help="the sample's runs and the forecast, no full run")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    if args.memory:
        MEMORY.extend(["--memory", args.memory])
    if args.max_candidates:
        MEMORY.extend(["--max-candidates", args.max_candidates])
    rows, details = [], []
    with tempfile.TemporaryDirectory(prefix="lshjob-forecast-") as tmp:
        tmp = Path(tmp)
        env = dict(os.environ)
        if args.calibrate:  # as a user would: lshjob calibrate on this machine, then plan
            calibrated = _lshjob("calibrate", "--out", str(tmp / "cost-model.json"))
            env["LSHJOB_COST_MODEL"] = calibrated["path"]
            details.append(f"calibration: {calibrated['provenance']} ({calibrated['seconds']} s)")
        for spec in args.runs:
            shape, entities = spec.split(":")[0], int(spec.split(":")[1])
            full = _events(shape, entities)
            keep = CACHE_OUT / f"{shape}-{entities}"
            keep.mkdir(parents=True, exist_ok=True)
            sample, smaller = keep / "sample.parquet", keep / "smaller.parquet"
            histories = [keep / "smaller.json", keep / "sample.json"]
            if not args.replan:
                _sample(full, args.share, sample)
                _sample(sample, args.small, smaller, seed=1)
                _run(sample, tmp / f"{shape}-warm")  # untimed: kernels loaded, files in the page cache
                for name, path, history in (("smaller", smaller, histories[0]), ("sample", sample, histories[1])):
                    history.write_text(json.dumps(_run(path, tmp / f"{shape}-{name}-index", args.sample_repeat),
                                                  indent=1, default=str))  # the fastest run's manifest
            small = json.loads(histories[1].read_text())
            events = pl.scan_parquet(_files(full)).select(pl.len()).collect().item()
            plan = _lshjob("plan", "--threshold", str(THRESHOLD), "--sample", str(sample), "--entity", "entity",
                           "--element", "element", "--entities", str(entities), "--events", str(events),
                           *[a for h in histories for a in ("--history", str(h))], *MEMORY, env=env)
            (keep / "plan.json").write_text(json.dumps(plan, indent=1, default=str))
            fc = plan["forecast"]
            if args.forecast_only:  # the full run not made (its forecast says what it would take)
                rows.append(f"| {shape} | {entities:,} | {events:,} | {small['counts']['entities']:,} "
                            f"({small['seconds']['total']:.2f} s) | {plan['perms']}, {plan['bands']}, {plan['rows']} / "
                            f"not run | {fc['counts']['candidate_pairs']:.3g} / - | {fc['seconds']['total']:.2f} / - | "
                            f"{fc.get('cpu_seconds', {}).get('total', 0):.1f} / - | "
                            f"{fc['peak_memory_bytes'] / 2**30:.2f} / - GiB | disk "
                            f"{fc['disk_bytes']['total'] / 2**30:.1f} GiB forecast; warnings: {fc['warnings']} |")
                print(rows[-1], flush=True)
                continue
            try:
                if args.replan:  # the full run kept from an earlier bench run
                    measured = json.loads((keep / "full.json").read_text())
                else:
                    load_before = os.getloadavg()[0]
                    measured = _run(full, tmp / f"{shape}-full", args.repeat)
                    measured["bench_load_before"] = load_before
                    (keep / "full.json").write_text(json.dumps(measured, indent=1, default=str))
            except SystemExit as refused:  # e.g. above --max-candidates: the forecast's warning says so
                rows.append(f"| {shape} | {entities:,} | {events:,} | - | - | "
                            f"{fc['counts']['candidate_pairs']:.3g} / refused | {fc['seconds']['total']:.2f} / - | "
                            f"- | run refused: {str(refused)[-160:]}; forecast warnings: {fc['warnings']} |")
                print(rows[-1], flush=True)
                continue
            load = f"{measured.get('bench_load_before', float('nan')):.1f} before, {os.getloadavg()[0]:.1f} after"
            total_ratio = fc["seconds"]["total"] / measured["seconds"]["total"]
            cpu_fc = (fc.get("cpu_seconds") or {}).get("total")
            cpu_run = (measured.get("cpu_seconds") or {}).get("total")
            cpu = f"{cpu_fc:.1f} / {cpu_run:.1f} = {cpu_fc / cpu_run:.2f}" if cpu_fc and cpu_run else "-"
            peak_ratio = fc["peak_memory_bytes"] / _peak(measured)
            rows.append(
                f"| {shape} | {entities:,} | {events:,} | {small['counts']['entities']:,} "
                f"({small['seconds']['total']:.2f} s) | {plan['perms']}, {plan['bands']}, {plan['rows']} / "
                f"{measured['plan']['perms']}, {measured['plan']['bands']}, {measured['plan']['rows']} | "
                f"{fc['counts']['candidate_pairs']:.3g} / {measured['counts']['candidate_pairs']:.3g} | "
                f"{fc['seconds']['total']:.2f} / {measured['seconds']['total']:.2f} = {total_ratio:.2f} | "
                f"{cpu} | {fc['peak_memory_bytes'] / 2**30:.2f} / {_peak(measured) / 2**30:.2f} GiB = "
                f"{peak_ratio:.2f} | "
                f"{'yes' if abs(total_ratio - 1) <= 0.25 and abs(peak_ratio - 1) <= 0.25 else 'no'} |")
            print(rows[-1], flush=True)
            details.append(f"{shape} {entities:,} (load average {load} the full run): per stage, forecast "
                           "/ measured seconds: " + ", ".join(
                f"{s} {fc['seconds'][s]:.2f} / {measured['seconds'].get(s, 0):.2f}" for s in fc["seconds"]
                if s != "total") + "; CPU s: " + ", ".join(
                f"{s} {v:.2f} / {(measured.get('cpu_seconds') or {}).get(s, 0):.2f}"
                for s, v in (fc.get("cpu_seconds") or {}).items() if s != "total") + "; peak MiB: " + ", ".join(
                f"{s} {fc['peak_memory_by_stage'][s] / 2**20:.0f} / "
                f"{measured['peak_memory_bytes'].get(s, 0) / 2**20:.0f}" for s in fc["peak_memory_by_stage"])
                + f"; method: {fc.get('method')}; scaling: {fc.get('scaling')}; counts forecast / run: " + ", ".join(
                    f"{k} {fc['counts'][k]:.4g} / {measured['counts'].get(k, 0):.4g}" for k in
                    ("representatives", "candidate_pairs", "verified_pairs", "published_rows")))
            print(details[-1], flush=True)
    report = "\n".join([
        f"machine: {machine()} (shared with other jobs while it ran: timings noisy)",
        f"command: python bench/forecast.py --runs {' '.join(args.runs)} --repeat {args.repeat} "
        f"--sample-repeat {args.sample_repeat}"
        + (" --replan (the runs kept from an earlier bench run)" if args.replan else "")
        + (" --calibrate" if args.calibrate else "") + (f" --memory {args.memory}" if args.memory else "")
        + (f" --max-candidates {args.max_candidates}" if args.max_candidates else "")
        + (" --forecast-only" if args.forecast_only else ""),
        f"sample: {args.share:.0%} of the entities, uniform, and {args.small:.0%} of it; threshold {THRESHOLD}; "
        "warm runs (kernels cached)",
        "",
        "| shape | entities | events | sample entities (its run) | plan k, b, r: forecast / run | candidates: "
        "forecast / run | total s: forecast / measured | CPU s: forecast / measured | peak memory: forecast / "
        "measured | within 25% (seconds, memory) |",
        "| --- | ---: | ---: | ---: | --- | --- | --- | --- | --- | --- |",
        *rows, "", *details,
    ])
    finish("Forecast from a 10% sample", report, not args.no_write)


if __name__ == "__main__":
    main()
