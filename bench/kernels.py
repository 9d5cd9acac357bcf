"""Where a run's time goes, kernel by kernel: each compiled parallel kernel's calls, wall clock
and CPU time in one ``lshjob run``, beside the stages' seconds from its manifest.

    python bench/kernels.py [--entities 1000000] [--exponent 1.2] [--run-option=--recall-of=lists] [--no-write]

Data: bench/common.py zipf_events (the long-tail benchmark's shape: Zipf popularity, log-normal
set sizes, a fifth near-copies); threshold 0.5, top-50, the defaults otherwise. The run is made
in this process through the Python API the command calls (``lshjob.cli.app``), twice: the first
compiles what the kernel cache lacks and is not reported. Every ``numba`` dispatcher compiled
with ``parallel=True`` in the ``lshjob`` package is wrapped, where each module holds it, by a
timer of ``time.perf_counter`` and ``time.process_time`` (the process's CPU time over all its
threads, numba's and DuckDB's among them). A kernel's CPU over its wall clock near the number
of cores means both cores worked; near 1, one waited. A stage's seconds beyond its kernels'
are Python, numpy, polars and DuckDB work (the table's last column).

A kernel's call counts for the stage whose timer ran when it was called (the run's stage
timers are wrapped to say which).
"""

from __future__ import annotations

import argparse
import collections
import importlib
import json
import pkgutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from common import finish, machine, zipf_events  # noqa: E402


def wrap_kernels(stats: dict, stage_now) -> int:
    """Wrap every parallel kernel of the lshjob package where its modules hold it; the count."""
    from numba.core.registry import CPUDispatcher

    import lshjob

    modules = []
    for info in pkgutil.walk_packages(lshjob.__path__, "lshjob."):
        if ".spark" in info.name or info.name.startswith("lshjob.cli"):
            continue  # (Spark is not this process's engine; the CLI holds no kernel)
        modules.append(importlib.import_module(info.name))
    wrapped: dict[int, object] = {}

    def timer(kernel, name):
        def call(*args, **kwargs):
            wall, cpu = time.perf_counter(), time.process_time()
            try:
                return kernel(*args, **kwargs)
            finally:
                row = stats[(stage_now(), name)]
                row[0] += 1
                row[1] += time.perf_counter() - wall
                row[2] += time.process_time() - cpu
        return call

    for module in modules:
        for attr, value in list(vars(module).items()):
            if isinstance(value, CPUDispatcher) and value.targetoptions.get("parallel"):
                name = f"{value.py_func.__module__.removeprefix('lshjob.')}.{value.py_func.__name__}"
                if id(value) not in wrapped:
                    wrapped[id(value)] = timer(value, name)
                setattr(module, attr, wrapped[id(value)])
    return len(wrapped)


def current_stage_reader():
    """A function giving the stage whose timer runs now: the run's stage timers
    (``lshjob.jobs.run._Stages``, whole stages and pieces of one) are wrapped to say so."""
    from lshjob.jobs import run

    now = ["?"]

    def entering(method):
        def timed(self, name, *args, **kwargs):
            inner = method(self, name, *args, **kwargs)

            class Named:
                def __enter__(self):
                    now[0] = name
                    return inner.__enter__()

                def __exit__(self, *exc):
                    now[0] = "?"
                    return inner.__exit__(*exc)
            return Named()
        return timed

    run._Stages.__call__ = entering(run._Stages.__call__)
    run._Stages.part = entering(run._Stages.part)
    return lambda: now[0]


def run_once(events: Path, out: Path, options: list[str]) -> dict:
    from typer.testing import CliRunner

    from lshjob.cli.app import app

    args = ["run", str(events), "--entity", "entity", "--element", "element", "--threshold", "0.5",
            "--top-k", "50", "--out", str(out), "--json", "--quiet", *options]
    result = CliRunner().invoke(app, args)
    if result.exit_code != 0:
        raise SystemExit(f"lshjob run exited {result.exit_code}: {result.output[-2000:]}")
    return json.loads((out / "manifest.json").read_text())


def report(manifest: dict, stats: dict, kernels: int, command: str, entities: int, exponent: float) -> str:
    seconds, cpu = manifest["seconds"], manifest["cpu_seconds"]
    lines = [
        f"Machine: {machine()}",
        f"Command: `{command}`",
        f"Data: bench/common.py zipf_events({entities}, exponent {exponent}); "
        f"{manifest['counts']['events']:,} events, {manifest['counts']['representatives']:,} representatives; "
        f"plan k={manifest['plan']['perms']}, b={manifest['plan']['bands']}, r={manifest['plan']['rows']}. "
        f"{kernels} parallel kernels wrapped; the second of two runs in one process.",
        "",
        "| stage | wall s | CPU s | kernels' wall s | outside the kernels s |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    by_stage = collections.defaultdict(float)
    for (stage, _), (_, wall, _) in stats.items():
        by_stage[stage] += wall
    for stage in ("ingest", "collapse", "plan", "sign", "band", "join", "verify", "publish"):
        if stage in seconds:
            inside = by_stage.get(stage, 0.0)
            lines.append(f"| {stage} | {seconds[stage]:.2f} | {cpu.get(stage, 0.0):.2f} | {inside:.2f} | "
                         f"{seconds[stage] - inside:.2f} |")
    lines.append(f"| whole run | {seconds['total']:.2f} | {cpu.get('total', 0.0):.2f} | "
                 f"{sum(by_stage.values()):.2f} | |")
    lines += ["", "| stage | kernel | calls | wall s | CPU s | CPU / wall |",
              "| --- | --- | ---: | ---: | ---: | ---: |"]
    for (stage, name), (calls, wall, used) in sorted(stats.items(), key=lambda item: -item[1][1]):
        if wall >= 0.05:
            lines.append(f"| {stage} | `{name}` | {calls} | {wall:.2f} | {used:.2f} | {used / wall:.2f} |")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--entities", type=int, default=1_000_000)
    parser.add_argument("--exponent", type=float, default=1.2)
    parser.add_argument("--run-option", action="append", default=[],
                        help="an option added to the run, e.g. --run-option=--recall-of=lists")
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args()
    events = zipf_events(args.entities, exponent=args.exponent)
    stats: dict = collections.defaultdict(lambda: [0, 0.0, 0.0])
    kernels = wrap_kernels(stats, current_stage_reader())
    with tempfile.TemporaryDirectory() as tmp:
        run_once(events, Path(tmp) / "first", args.run_option)  # compiles what the cache lacks
        stats.clear()
        manifest = run_once(events, Path(tmp) / "second", args.run_option)
    command = "python bench/kernels.py " + " ".join(sys.argv[1:])
    finish("Where a long-tailed run's time goes, kernel by kernel",
           report(manifest, stats, kernels, command, args.entities, args.exponent), not args.no_write)


if __name__ == "__main__":
    main()
