"""``lshjob drift`` on small monthly sets (5 to 10 authors per patron and month;
tests/drift_data.py), against the naive rule "similarity to the previous month below x".

Per seed: 2000 patrons, 12 months, 5% drifters (shelves of 8 to 12 authors, 95% of loans
from the shelf), signed per month (kperm, k=128), drift with its defaults. P / R as in
tests/drift_data.entity_scores (a drifter found when its change month is flagged; precision
over every patron reported). The naive rule at the smallest x reaching recall 0.9 (chosen with
the answers: its best case). With ``season``: everyone borrows 40% of each summer month's
loans from a shared pool of holiday authors; recall then split by changes inside and outside
June to August.

Usage: python bench/drift_small.py --seeds 2026 1 2 3 4 5 [--write]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from drift_data import SUMMER, entity_scores, library_months  # noqa: E402

from bench.common import finish, machine  # noqa: E402
from lshjob.ingest.spec import EventSpec  # noqa: E402
from lshjob.jobs.drift import drift_file  # noqa: E402
from lshjob.jobs.sign import sign_file  # noqa: E402
from lshjob.sign.signatures import SignatureParams  # noqa: E402

SPEC = EventSpec(entity="patron", element="author", time="borrowed_at", period="month")


def naive_at_recall(rows, planted, recall=0.9):
    for x in np.arange(0.0, 1.0001, 0.01):
        precision, got = entity_scores(rows, planted, pl.col("similarity") < x)
        if got >= recall:
            return precision
    return float("nan")


def run(seed: int, season: bool, folder: Path) -> str:
    events, planted = library_months(2000, 12, drift_rate=0.05, seed=seed, shelf=(8, 12), own_share=0.95,
                                     season=season)
    events.write_parquet(folder / "e.parquet")
    sign_file(folder / "e.parquet", folder / "s.parquet", SPEC, SignatureParams())
    rows, _ = drift_file(folder / "s.parquet", folder / "d.parquet")
    precision, recall = entity_scores(rows, planted, pl.col("flagged"))
    summer = pl.col("change_month").dt.month().is_in([m + 1 for m in SUMMER])
    inside = entity_scores(rows, planted.filter(summer | pl.col("change_month").is_null()), pl.col("flagged"))[1]
    outside = entity_scores(rows, planted.filter(~summer | pl.col("change_month").is_null()), pl.col("flagged"))[1]
    return (f"| {seed} | {'yes' if season else 'no'} | {precision:.2f} / {recall:.2f} "
            f"| {naive_at_recall(rows, planted):.2f} | {inside:.2f} / {outside:.2f} |")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--seeds", type=int, nargs="+", default=[2026, 1, 2, 3, 4, 5])
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    lines = ["| seed | season | drift P / R | naive P at R 0.9 | recall: changes in summer / outside |",
             "| --- | --- | --- | --- | --- |"]
    with tempfile.TemporaryDirectory() as tmp:
        for season in (False, True):
            for seed in args.seeds:
                lines.append(run(seed, season, Path(tmp)))
    report = "\n".join([
        f"Machine: {machine()} (shared with other jobs)",
        "Data: library_months in tests/drift_data.py (2000 patrons, 12 months, 5% drifters, shelves of 8-12 authors, "
        "95% own), 5-10 authors per patron and month; kperm k=128; drift defaults (--history 3, --z 3.5)",
        f"Command: `python bench/drift_small.py --seeds {' '.join(map(str, args.seeds))}`",
        "", *lines])
    finish("Drift on small monthly sets", report, args.write)


if __name__ == "__main__":
    main()
