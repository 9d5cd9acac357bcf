"""How well ``lshjob drift`` finds the library demo's planted drifters by genre, and how well
any rule could.

Per seed: the demo (``generate_events``), signed per patron and month with the loans' genre as
the element, then ``drift_file`` at each history and z asked for. Scored against planted.parquet
(kind drifter) over the ordinary readers (patrons planted as group, skew trap or heavy left
out): a patron counts as flagged if any of its rows is (``any``) or its July or August row is
(``change``: drifters change favourite genre from July). Summer readers: patrons with at least
one ``S`` (summer) title; their flag rate is set beside the other non-drifters'.

Two bounds, from exact genre counts (no signatures), with the threshold chosen knowing the
answers (each rule's best case):

* ``set``: the exact containment of the July-December genre set in the January-June one, the
  best a rule comparing sets of genres could do;
* ``counts``: the likelihood ratio of "favourite changed at July" against "same favourite"
  under the generator's own model (favourite genre with probability 0.7 + 0.3/8, each other
  with 0.3/8), summed over the favourites: the Neyman-Pearson best for these loans.

A second way in, closer to the counts: half-year periods (a ``half`` column, each loan's time
truncated to its half year, signed with ``--time half --period month``) and each loan of a genre
in a period numbered (``genre_loan``: "crime#1", "crime#2", ...), so a set holds the genre's
loan count and the history's union (element-wise minimum of signatures) the largest count.

``observable``: the same figures over patrons with at least 4 general-collection loans in
each half year (a drifter with fewer shows little of its change in any rule).

Usage: python bench/drift_demo.py --patrons 1200 --seeds 2026 7 11 --history 3 6 --z 2 3.5 [--write]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl
from scipy.special import logsumexp

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.common import finish, machine  # noqa: E402
from lshjob.demo.generate import GENRE_NAMES, GENRES, generate_events  # noqa: E402
from lshjob.ingest.spec import EventSpec  # noqa: E402
from lshjob.jobs.drift import drift_file  # noqa: E402
from lshjob.jobs.sign import sign_file  # noqa: E402
from lshjob.sign.signatures import SignatureParams  # noqa: E402

SPEC = EventSpec(entity="patron", element="genre", time="borrowed_at", period="month")
HALF_SPEC = EventSpec(entity="patron", element="genre_loan", time="half", period="month")


def numbered_half_years(events: pl.DataFrame) -> pl.DataFrame:
    """``half`` (the loan's half year) and ``genre_loan`` (genre and the loan's number among the
    patron's loans of that genre in that half year)."""
    events = events.with_columns(half=pl.col("borrowed_at").dt.truncate("6mo"))
    number = pl.col("genre").cum_count().over("patron", "half", "genre").cast(pl.String)
    return events.with_columns(genre_loan=pl.col("genre") + "#" + number)
MIN_EACH_HALF = 4


def scores(flagged: set, truth: set, among: set) -> tuple[float, float]:
    got = flagged & among
    hits = len(got & truth & among)
    return hits / max(1, len(got)), hits / max(1, len(truth & among))


def best_min(stat: np.ndarray, truth: np.ndarray) -> float:
    """max over thresholds of min(precision, recall), flagging the largest ``stat`` first."""
    t = truth[np.argsort(-stat, kind="stable")]
    hits = np.cumsum(t)
    return float(np.max(np.minimum(hits / np.arange(1, len(t) + 1), hits / max(1, t.sum()))))


def half_counts(events: pl.DataFrame, readers: list[str]) -> np.ndarray:
    """(patron, half, genre) loan counts of the general collection."""
    code = {g: i for i, g in enumerate(GENRE_NAMES)}
    x = (events.filter(pl.col("genre").is_in(GENRE_NAMES))
         .with_columns(half=(pl.col("borrowed_at").dt.month() >= 7).cast(pl.Int64),
                       g=pl.col("genre").replace_strict(code, return_dtype=pl.Int64))
         .group_by("patron", "half", "g").len())
    where = {p: i for i, p in enumerate(readers)}
    counts = np.zeros((len(readers), 2, GENRES))
    for patron, half, g, n in x.iter_rows():
        if patron in where:
            counts[where[patron], half, g] += n
    return counts


def bounds(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(set rule's statistic, likelihood ratio) per patron; larger means more likely a drifter."""
    have = counts > 0
    after = have[:, 1].sum(1)
    contained = (have[:, 1] & have[:, 0]).sum(1) / np.maximum(after, 1)
    a, b = np.log(0.7 + 0.3 / GENRES), np.log(0.3 / GENRES)
    ll = [c * a + (c.sum(1, keepdims=True) - c) * b for c in (counts[:, 0], counts[:, 1])]
    same = logsumexp(ll[0] + ll[1], axis=1)
    pair = ll[0][:, :, None] + ll[1][:, None, :]
    pair[:, np.arange(GENRES), np.arange(GENRES)] = -np.inf
    changed = logsumexp(pair.reshape(len(counts), -1), axis=1) - np.log(GENRES - 1)
    return -contained, changed - same


def run_seed(patrons: int, seed: int, histories, zs, folder: Path) -> list[str]:
    events, planted = generate_events(patrons, seed)
    src, sigs = folder / f"loans-{seed}.parquet", folder / f"monthly-{seed}.parquet"
    numbered_half_years(events).write_parquet(src)
    sign_file(src, sigs, SPEC, SignatureParams())
    sign_file(src, folder / f"halves-{seed}.parquet", HALF_SPEC, SignatureParams())
    drifters = set(planted.filter(pl.col("kind") == "drifter")["patron"])
    readers = sorted(set(events["patron"]) - (set(planted["patron"]) - drifters))
    counts = half_counts(events, readers)
    observable = {p for p, c in zip(readers, counts) if c.sum(1).min() >= MIN_EACH_HALF}
    summer = set(events.filter(pl.col("genre") == "summer")["patron"]) - drifters
    others = set(readers) - drifters - summer
    truth = np.array([p in drifters for p in readers])
    keep = np.array([p in observable for p in readers])
    set_stat, lr = bounds(counts)
    lines = [f"| {seed} | bound: sets of genres, half years (exact; best min(P, R)) "
             f"| {best_min(set_stat, truth):.2f} "
             f"| {best_min(set_stat[keep], truth[keep]):.2f} | - | - | - |",
             f"| {seed} | bound: genre counts, half years (likelihood ratio; best min(P, R)) "
             f"| {best_min(lr, truth):.2f} "
             f"| {best_min(lr[keep], truth[keep]):.2f} | - | - | - |"]
    runs = [(sigs, "monthly genre sets", history, z) for history in histories for z in zs]
    runs += [(folder / f"halves-{seed}.parquet", "half years, numbered genre loans", 6, z) for z in zs]
    for source, what, history, z in runs:
            rows, _ = drift_file(source, folder / f"drift-{seed}.parquet", history=history, z=z)
            flagged_any = set(rows.filter("flagged")["entity"])
            change = set(rows.filter(pl.col("flagged") & pl.col("period").dt.month().is_in([7, 8]))["entity"])
            cells = []
            for rule in (flagged_any, change):
                for among in (set(readers), observable):
                    p, r = scores(rule, drifters, among)
                    cells.append(f"{p:.2f} / {r:.2f}")
            rate_summer = len(flagged_any & summer) / max(1, len(summer))
            rate_others = len(flagged_any & others) / max(1, len(others))
            lines.append(f"| {seed} | {what}: drift --history {history} --z {z} | {cells[0]} | {cells[1]} | {cells[2]} "
                         f"| {cells[3]} | {rate_summer:.2f} vs {rate_others:.2f} |")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--patrons", type=int, default=1200)
    parser.add_argument("--seeds", type=int, nargs="+", default=[2026, 7, 11])
    parser.add_argument("--history", type=int, nargs="+", default=[3, 6])
    parser.add_argument("--z", type=float, nargs="+", default=[2.0, 3.5])
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    lines = ["| seed | rule | any row: P / R (all) | any row: P / R (observable) | July-Aug: P / R (all) "
             "| July-Aug: P / R (observable) | flag rate: summer readers vs other non-drifters |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    with tempfile.TemporaryDirectory() as tmp:
        for seed in args.seeds:
            lines += run_seed(args.patrons, seed, args.history, args.z, Path(tmp))
    report = "\n".join([
        f"Machine: {machine()}",
        f"Data: lshjob demo, {args.patrons} patrons, seeds {' '.join(map(str, args.seeds))}; signed per patron "
        "and month with element genre (kperm, k=128)",
        f"Command: `python bench/drift_demo.py --patrons {args.patrons} --seeds {' '.join(map(str, args.seeds))} "
        f"--history {' '.join(map(str, args.history))} --z {' '.join(map(str, args.z))}`",
        "P / R: precision / recall of planted drifters among ordinary readers. Bounds: best min(P, R) over "
        "thresholds chosen with the answers (columns 'all' and 'observable' = at least "
        f"{MIN_EACH_HALF} general loans in each half year).",
        "", *lines])
    finish(f"Drift on the library demo by genre, {args.patrons} patrons", report, args.write)


if __name__ == "__main__":
    main()
