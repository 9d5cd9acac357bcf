"""What ingest's input checks cost: Unicode NFC of text keys, and CSV read as text.

    python bench/ingest_checks.py --rows 1000000

* Unicode: ``load_membership`` on text keys (entities ``patron-N``, elements ``title-N``),
  ``--unicode asis`` against ``nfc``, for all-ASCII keys and for keys with a non-ASCII
  letter of which half are written in NFD;
* CSV: the same integer events as Parquet and as CSV, ``open_events`` (checks: per-file
  schema, separators per line, keys read as text and found to be plain integers) and
  ``read_and_group`` (the streaming pass), timed apart.

Each figure is the best of ``--repeat`` runs, wall clock and CPU time of the process.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import unicodedata
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).parent))
from common import best, finish, machine  # noqa: E402

from lshjob import EventSpec  # noqa: E402
from lshjob.ingest.loading import load_membership, open_events, read_and_group  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-write", action="store_true", help="print only; do not append to RESULTS.md")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n = args.rows
    patrons, titles = rng.integers(0, n // 20, n), rng.integers(0, n // 10, n)
    lines = [f"Machine: {machine()}",
             f"Command: `python bench/ingest_checks.py --rows {n} --repeat {args.repeat}`", "",
             "| input | run | wall s | CPU s |", "| --- | --- | ---: | ---: |"]
    with tempfile.TemporaryDirectory() as tmp:
        for label, first, second in (("text keys, ASCII", "patron-", "title-"),
                                     ("text keys, non-ASCII, half NFD", "Zoë-", "Ångström-")):
            def form(prefix, i, label=label):
                return unicodedata.normalize("NFD", prefix) if "half" in label and i % 2 else prefix
            frame = pl.DataFrame({"patron": [form(first, i) + str(p) for i, p in enumerate(patrons)],
                                  "title": [form(second, i) + str(t) for i, t in enumerate(titles)]})
            path = Path(tmp) / "text.parquet"
            frame.write_parquet(path)
            for mode in ("asis", "nfc"):
                spec = EventSpec(entity="patron", element="title", unicode=mode)
                wall, cpu = best(lambda path=path, spec=spec: load_membership(path, spec), args.repeat)
                lines.append(f"| {label} | load_membership, --unicode {mode} | {wall:.3f} | {cpu:.3f} |")
        ints = pl.DataFrame({"patron": patrons, "title": titles})
        spec = EventSpec(entity="patron", element="title")
        for fmt in ("parquet", "csv"):
            path = Path(tmp) / f"ints.{fmt}"
            getattr(ints, f"write_{fmt}")(path)
            wall, cpu = best(lambda path=path: open_events(path, spec), args.repeat)
            lines.append(f"| integer keys, {fmt} | open_events (checks) | {wall:.3f} | {cpu:.3f} |")
            events = open_events(path, spec)
            wall, cpu = best(lambda events=events: read_and_group(events, None), args.repeat)
            lines.append(f"| integer keys, {fmt} | read_and_group (streaming pass) | {wall:.3f} | {cpu:.3f} |")
    finish(f"Ingest checks, {n:,} rows", "\n".join(lines), not args.no_write)


if __name__ == "__main__":
    main()
