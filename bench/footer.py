"""Parquet footer statistics: what the statistics pass of ``lshjob sign`` pays for them.

    python bench/footer.py [--baseline REV] [--rows 1000000] [--repeat 5]

Times, each in a fresh process (the median of ``--repeat`` processes):

* ``import duckdb`` after polars and numpy are loaded (as they are in ``lshjob sign``);
* the first ``footer_stats`` call of ``lshjob.ingest.parquet_footer`` in a process with
  polars and numpy loaded, its module's imports included (DuckDB's import too, when the
  module uses DuckDB), and a second call in the same process;
* the whole ``lshjob sign FILE`` command (wall clock);

on ``demo_data/loans.parquet`` (text keys: row and null counts only) and on a file of
``--rows`` events with integer keys (bounds of the entity column too). With ``--baseline
REV`` the same runs on that revision's package (``git archive`` into a temporary folder,
imported through PYTHONPATH; ``python -P`` so that the current folder does not shadow it),
alternating with the working tree's. It also reports whether
the ``lshjob`` command loads DuckDB before any command runs.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import CACHE, finish, machine  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent

FOOTER = """
import sys, time
import numpy, polars
from pathlib import Path
start = time.perf_counter()
from lshjob.ingest.parquet_footer import footer_stats
args = ([Path(sys.argv[1])], ["patron", "title"], sys.argv[2] or None)
first = footer_stats(*args)
middle = time.perf_counter()
footer_stats(*args)
print(middle - start, time.perf_counter() - middle, first["rows"])
"""

IMPORT_DUCKDB = """
import time
import numpy, polars
start = time.perf_counter()
import duckdb
print(time.perf_counter() - start)
"""

LOADED = "import sys, lshjob.cli.app; print('duckdb' in sys.modules)"


def events_file(rows: int) -> Path:
    """``rows`` loans with integer patrons (the entity), text titles and two branches."""
    CACHE.mkdir(exist_ok=True)
    path = CACHE / f"footer_{rows}.parquet"
    if not path.exists():
        rng = np.random.default_rng(0)
        pl.DataFrame({
            "patron": rng.integers(0, rows // 40 + 1, rows),
            "title": pl.Series(rng.integers(0, 50_000, rows)).cast(pl.String).str.pad_start(6, "0"),
            "branch": rng.choice(["Harbour", "Riverside"], rows),
        }).write_parquet(path)
    return path


def python(code: str, args: list[str], pythonpath: str | None) -> list[str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    if pythonpath:
        env["PYTHONPATH"] = pythonpath
    out = subprocess.run([sys.executable, "-P", "-c", code, *args], env=env, check=True, capture_output=True, text=True)
    return out.stdout.split()


def sign_seconds(source: Path, out: Path, pythonpath: str | None) -> float:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    if pythonpath:
        env["PYTHONPATH"] = pythonpath
    start = time.perf_counter()
    subprocess.run([sys.executable, "-P", "-m", "lshjob.cli.app", "sign", str(source), "--entity", "patron",
                    "--element", "title", "--out", str(out), "--quiet"], env=env, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - start


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--baseline", help="git revision to compare with")
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    files = {"demo_data/loans.parquet": (ROOT / "demo_data" / "loans.parquet", ""),
             f"{args.rows:,} rows, integer patrons": (events_file(args.rows), "patron")}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        versions = {"working tree": None}
        if args.baseline:
            base = tmp / "baseline"
            base.mkdir()
            archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.baseline, "lshjob"],
                                     check=True, capture_output=True).stdout
            subprocess.run(["tar", "-x", "-C", str(base)], input=archive, check=True)
            versions = {args.baseline: str(base), **versions}
        sign_seconds(files["demo_data/loans.parquet"][0], tmp / "warm.parquet", None)  # compile cache filled
        times: dict[tuple, list[float]] = {}
        duck = [float(python(IMPORT_DUCKDB, [], None)[0]) for _ in range(args.repeat)]
        for _ in range(args.repeat):
            for label, pythonpath in versions.items():
                for name, (path, bounds) in files.items():
                    first, second, _ = python(FOOTER, [str(path), bounds], pythonpath)
                    times.setdefault((label, name, "first"), []).append(float(first))
                    times.setdefault((label, name, "second"), []).append(float(second))
                    times.setdefault((label, name, "sign"), []).append(sign_seconds(path, tmp / "s.parquet",
                                                                                    pythonpath))
        loaded = {label: python(LOADED, [], pythonpath)[0] for label, pythonpath in versions.items()}
    rows = []
    for label in versions:
        for name in files:
            first, second, sign = (statistics.median(times[(label, name, k)]) for k in ("first", "second", "sign"))
            rows.append(f"| {label} | {name} | {first * 1000:.1f} | {second * 1000:.2f} | {sign:.2f} |")
    command = "python bench/footer.py" + (f" --baseline {args.baseline}" if args.baseline else "") + (
        f" --rows {args.rows}" if args.rows != 1_000_000 else "") + f" --repeat {args.repeat}"
    import duckdb

    lines = [
        (f"Machine: {machine()}, duckdb {duckdb.__version__}, load average {os.getloadavg()[0]:.1f} at the end "
         "(a shared machine)"),
        f"Command: `{command}` (medians of {args.repeat} fresh processes)",
        "",
        (f"`import duckdb` after polars and numpy: {statistics.median(duck) * 1000:.0f} ms "
         f"(min {min(duck) * 1000:.0f}, max {max(duck) * 1000:.0f})."),
        "The `lshjob` command has DuckDB loaded before the command runs: "
        + ", ".join(f"{label}: {'yes' if v == 'True' else 'no'}" for label, v in loaded.items()) + ".",
        "",
        "| code | file | first call ms (with its imports) | second call ms | `lshjob sign` s |",
        "| --- | --- | ---: | ---: | ---: |",
        *rows,
    ]
    finish("Parquet footer statistics: hand decoder and DuckDB", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
