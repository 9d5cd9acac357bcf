"""Other long-tailed shapes: does ``lshjob run`` finish, within its memory budget, with the
recall it promises, when the popularity curve, the share of near-copies, the threshold and
top-k move away from the shape the long-tail benchmark is tuned on?

    python bench/shapes.py --entities 200000 [--sample 200] [--no-write]

Data: bench/common.py zipf_events at each Zipf exponent (a flatter head at 1.05, the
benchmark's 1.2, a steep head at 1.5 and 2.0, where most events fall on a handful of
elements and the buckets of those elements hold most entities), with and without
near-copies. Each case is one whole process (``python -m lshjob run ... --json --quiet``)
under a wall clock and the children's CPU clock; the manifest gives the per-stage peak
memory and the budget. Recall: the published lists against brute force (bench/longtail.py
``recall``: exact Jaccard by sparse intersection counts, scipy) on a sample of entities,
ties at the k-th value honoured.
"""

from __future__ import annotations

import argparse
import json
import resource
import shlex
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from common import finish, machine, zipf_events  # noqa: E402
from longtail import recall  # noqa: E402

# (exponent, copies, threshold, top_k)
CASES = [
    (1.05, 0.2, 0.5, 50),
    (1.2, 0.2, 0.5, 50),
    (1.5, 0.2, 0.5, 50),
    (2.0, 0.2, 0.5, 50),
    (1.2, 0.0, 0.5, 50),
    (1.2, 0.2, 0.3, 50),
    (1.2, 0.2, 0.8, 10),
]


def run_case(events: Path, out: Path, threshold: float, top_k: int, extra: tuple[str, ...] = ()
             ) -> tuple[int, float, float, dict | None, str]:
    cmd = [sys.executable, "-m", "lshjob", "run", str(events), "--entity", "entity", "--element", "element",
           "--threshold", str(threshold), "--top-k", str(top_k), "--out", str(out), "--json", "--quiet", *extra]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run(cmd, capture_output=True, text=True, cwd=out.parent)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    manifest = json.loads(done.stdout) if done.returncode == 0 else None
    last = done.stderr.strip().splitlines()
    return done.returncode, wall, cpu, manifest, last[-1] if last else ""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--entities", type=int, default=200_000)
    parser.add_argument("--sample", type=int, default=200)
    parser.add_argument("--no-write", action="store_true")
    parser.add_argument("--variant", default="", help='options added to every run, e.g. "--recall-of pairs"')
    args = parser.parse_args()
    extra = tuple(shlex.split(args.variant))
    variant = f" --variant {shlex.quote(args.variant)}" if extra else ""
    lines = [f"Machine: {machine()}",
             f"Command: `python bench/shapes.py --entities {args.entities} --sample {args.sample}{variant}`",
             "Each case one warm process (kernels compiled by an untimed first run); recall of the true "
             "top-k on the sampled entities (ties honoured).", "",
             "| Zipf exponent | near-copies | threshold | top-k | events | exit | wall s | CPU s | peak memory "
             "(stage) / budget | plan k, b, r | candidate rows | verified pairs | recall (true pairs) | warnings |",
             "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- | --- | ---: | ---: | --- | --- |"]
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        warm = zipf_events(2000)
        run_case(warm, tmp / "warm", 0.5, 50)
        for i, (exponent, copies, threshold, top_k) in enumerate(CASES):
            events = zipf_events(args.entities, exponent, copies)
            out = tmp / f"case{i}"
            code, wall, cpu, manifest, err = run_case(events, out, threshold, top_k, extra)
            if manifest is None:
                lines.append(f"| {exponent} | {copies} | {threshold} | {top_k} | | {code} | {wall:.1f} | {cpu:.1f} "
                             f"| | | | | | {err[:200]} |")
                print(lines[-1], flush=True)
                continue
            peaks = manifest["peak_memory_bytes"]
            stage = max(peaks, key=peaks.get)
            plan = manifest["plan"]
            rec, pairs, _, err = recall(events, out / "neighbours.parquet", args.sample, threshold=threshold,
                                        top_k=top_k)
            counts = manifest["counts"]
            lines.append(
                f"| {exponent} | {copies} | {threshold} | {top_k} | {counts['events']:,} | 0 | {wall:.1f} | {cpu:.1f} "
                f"| {peaks[stage] / 2**30:.2f} GiB ({stage}) / {manifest['memory_budget_bytes'] / 2**30:.2f} GiB "
                f"| {plan.get('perms')}, {plan.get('bands')}, {plan.get('rows')} | {counts['candidate_pairs']:,} "
                f"| {counts['verified_pairs']:,} | {rec:.3f} ± {err:.3f} ({pairs:,}) "
                f"| {len(manifest.get('warnings', []))} |")
            print(lines[-1], flush=True)
    finish(f"Other long-tailed shapes, {args.entities:,} entities{variant}", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
