"""Cold start: the first command on a machine compiles lshjob's kernels; later ones load them.

    python bench/cold_start.py [--baseline REV] [--repeat 2] [--fill]

Runs ``lshjob demo --quiet`` and ``lshjob run demo_data/loans.parquet`` in fresh processes,
each first with an empty compile cache (a new LSHJOB_CACHE_DIR / NUMBA_CACHE_DIR) and then
again with the cache it left (warm), and reports wall clock and CPU time (user + system of
the child; on a shared machine the CPU time is the steadier figure). With ``--baseline REV``
the same commands run on that revision's package (``git archive`` into a temporary folder,
imported through PYTHONPATH), alternating with the working tree's. ``--fill`` also times
``lshjob compile-kernels`` into an empty cache and a demo after it.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from common import finish, machine  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


def timed(args: list[str], env: dict) -> tuple[float, float]:
    """(wall seconds, CPU seconds of the child) of ``python -m lshjob.cli.app ARGS``."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    subprocess.run([sys.executable, "-m", "lshjob.cli.app", *args], env=env, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def commands(out: Path) -> dict[str, list[str]]:
    return {
        "lshjob demo --quiet": ["demo", "--out", str(out / "demo"), "--quiet"],
        "lshjob run demo_data/loans.parquet": ["run", str(ROOT / "demo_data" / "loans.parquet"), "--entity", "patron",
                                               "--element", "title", "--threshold", "0.5", "--out",
                                               str(out / "index"), "--quiet"],
    }


def environment(cache: Path, pythonpath: str | None) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "LSHJOB_CACHE_DIR", "NUMBA_CACHE_DIR")}
    env.update(LSHJOB_CACHE_DIR=str(cache), NUMBA_CACHE_DIR=str(cache))  # the baseline knows only numba's
    if pythonpath:
        env["PYTHONPATH"] = pythonpath
    return env


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--baseline", help="git revision to compare with")
    ap.add_argument("--repeat", type=int, default=1, help="cold and warm rounds per command (the best is kept)")
    ap.add_argument("--fill", action="store_true", help="also time lshjob compile-kernels")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        versions = {"working tree": None}
        if args.baseline:
            base = tmp / "baseline"
            base.mkdir()
            archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.baseline, "lshjob", "sql"],
                                     check=True, capture_output=True).stdout
            subprocess.run(["tar", "-x", "-C", str(base)], input=archive, check=True)
            versions = {args.baseline: str(base), **versions}
        rows = []
        best: dict[tuple, tuple[float, float]] = {}
        for r in range(args.repeat):
            for label, pythonpath in versions.items():
                for name, cmd in commands(tmp / f"out-{r}").items():
                    cache = tmp / f"cache-{label.replace(' ', '-')}-{r}-{len(name)}"
                    env = environment(cache, pythonpath)
                    for state in ("cold", "warm"):
                        wall, cpu = timed(cmd, env)
                        key = (label, name, state)
                        best[key] = min(best.get(key, (wall, cpu)), (wall, cpu))
        for (label, name, state), (wall, cpu) in best.items():
            rows.append(f"| {label} | `{name}` | {state} | {wall:.1f} | {cpu:.1f} |")
        if args.fill:
            cache = tmp / "cache-fill"
            env = environment(cache, None)
            wall, cpu = timed(["compile-kernels", "--quiet"], env)
            rows.append(f"| working tree | `lshjob compile-kernels` | cold | {wall:.1f} | {cpu:.1f} |")
            wall, cpu = timed(commands(tmp / "after-fill")["lshjob demo --quiet"], env)
            rows.append(f"| working tree | `lshjob demo --quiet` after compile-kernels | warm "
                        f"| {wall:.1f} | {cpu:.1f} |")
    command = "python bench/cold_start.py" + (f" --baseline {args.baseline}" if args.baseline else "") + (
        f" --repeat {args.repeat}" if args.repeat > 1 else "") + (" --fill" if args.fill else "")
    lines = [
        f"Machine: {machine()}, load average {os.getloadavg()[0]:.1f} at the end (a shared machine)",
        f"Command: `{command}`",
        "",
        f"| code | command | cache | wall s{' (best)' if args.repeat > 1 else ''} | CPU s (user + system) |",
        "| --- | --- | --- | ---: | ---: |",
        *rows,
    ]
    finish("Cold start: compiling the kernels", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
