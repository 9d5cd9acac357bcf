"""Demo scenario: a fictional public library network (invented data, for demos only).

Patrons borrow titles at branches over the months of 2026. The generator is seeded
and deterministic (numpy's PCG64 stream) and plants structure a test can recover:

* groups of patrons with near-identical reading and a designed Jaccard similarity:
  members share a base list of m titles and each adds x titles of their own from
  the local-history collection, so any two members have Jaccard m / (m + 2x);
* long-tailed title popularity (power law within each of eight genres) and
  long-tailed history sizes (log-normal);
* seasonal reading: summer titles borrowed only in June to August;
* drifters: patrons whose favourite genre changes at mid-year;
* a skew trap: many patrons whose only loan is the same bestseller;
* a few heavy readers with very large histories.

Each loan's ``genre`` is read off its title id, never drawn: a general title ``T`` numbered
idx is of genre idx mod 8 (the reader loans number them rank * 8 + genre), ``S`` titles are
"summer", ``L`` titles "local history".

``planted.parquet`` lists the planted patrons: kind (group, skew_trap, heavy, drifter),
group id and designed Jaccard.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.atomic import atomic_file
from lshjob.errors import ParameterError
from lshjob.runtime.outputs import DEMO_MARKER, demo_folder

BRANCHES = ["Riverside", "Old Town", "Hilltop", "Harbour", "Northgate", "Meadowbank"]
GENRES = 8
GENRE_NAMES = ("crime", "romance", "science fiction", "history", "travel", "cookery", "poetry", "biography")
BESTSELLER = "T000000"
# (base titles m, own titles x): designed Jaccard m / (m + 2x)
GROUP_DESIGNS = [(36, 2), (32, 4), (28, 6), (24, 8), (20, 10)]
YEAR = 2026


MAX_PATRONS = 1_000_000  # about 20 million loans, a few GiB while generating


def check_options(patrons: int, seed: int) -> None:
    """Refuse options the generator cannot use, before anything is made."""
    if not 100 <= patrons <= MAX_PATRONS:
        raise ParameterError(f"--patrons must be from 100 to {MAX_PATRONS}; got {patrons}")
    if seed < 0:
        raise ParameterError(f"--seed must be 0 or more; got {seed}")


def generate_events(patrons: int = 2000, seed: int = 7) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Return (events, planted). events: patron, title, branch, borrowed_at, loans, genre."""
    check_options(patrons, seed)
    rng = np.random.default_rng(seed)
    n_general = max(3000, 3 * patrons)
    n_summer = max(150, n_general // 20)
    n_skew = max(50, patrons // 20)
    n_heavy = max(3, patrons // 500)
    n_groups = max(5, patrons // 100)
    group_sizes = rng.integers(3, 7, size=n_groups)
    n_grouped = int(group_sizes.sum())
    n_regular = patrons - n_skew - n_heavy - n_grouped
    if n_regular < 10:
        raise ParameterError(f"--patrons {patrons} is too small for the planted structure")

    ids = np.arange(patrons)
    rng.shuffle(ids)
    names = np.array([f"P{i:06d}" for i in ids])
    regular, rest = names[:n_regular], names[n_regular:]
    skew, rest = rest[:n_skew], rest[n_skew:]
    heavy, grouped = rest[:n_heavy], rest[n_heavy:]

    pieces: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []  # (patron, title, month)
    sizes = np.clip(np.round(rng.lognormal(2.6, 0.9, n_regular)), 1, 400).astype(np.int64)
    drifter = rng.random(n_regular) < 0.05
    pieces.append(_reader_loans(rng, regular, sizes, drifter, n_general, n_summer))
    for p in heavy:  # heavy readers range over the whole collection
        picks = rng.choice(n_general, size=int(rng.integers(800, 1500)), replace=False)
        titles = np.char.add("T", np.char.zfill(picks.astype(str), 6))
        pieces.append((np.full(len(titles), p), titles, rng.integers(0, 12, len(titles))))
    pieces.append((skew, np.full(n_skew, BESTSELLER), rng.integers(0, 12, n_skew)))

    planted_rows = [(p, "skew_trap", None, None) for p in skew]
    planted_rows += [(p, "heavy", None, None) for p in heavy]
    planted_rows += [(p, "drifter", None, None) for p in regular[drifter]]
    start, own_next = 0, 0
    for g, size in enumerate(group_sizes):
        m, x = GROUP_DESIGNS[g % len(GROUP_DESIGNS)]
        members = grouped[start : start + size]
        start += size
        base = [f"T{t:06d}" for t in rng.choice(n_general, size=m, replace=False)]
        for p in members:
            own = [f"L{own_next + i:06d}" for i in range(x)]
            own_next += x
            titles = np.array(base + own)
            pieces.append((np.full(len(titles), p), titles, rng.integers(0, 12, len(titles))))
            planted_rows.append((p, "group", f"G{g:04d}", m / (m + 2 * x)))

    patron = np.concatenate([p[0] for p in pieces])
    title = np.concatenate([p[1] for p in pieces])
    month = np.concatenate([p[2] for p in pieces])
    n = len(patron)
    home_index = np.searchsorted(np.sort(names), patron)  # stable per patron name
    branch_idx = np.where(rng.random(n) < 0.2, rng.integers(0, len(BRANCHES), n), home_index % len(BRANCHES))
    branch = np.array(BRANCHES)[branch_idx]
    month_start = np.array([f"{YEAR}-{m:02d}-01" for m in range(1, 13)], dtype="datetime64[us]")
    borrowed_at = (
        month_start[month]
        + rng.integers(0, 28, n).astype("timedelta64[D]")
        + rng.integers(9 * 60, 19 * 60, n).astype("timedelta64[m]")
    )
    loans = np.where(rng.random(n) < 0.1, 2, 1)
    events = pl.DataFrame(
        {
            "patron": patron,
            "title": title,
            "branch": branch,
            "borrowed_at": pl.Series(borrowed_at),
            "loans": pl.Series(loans, dtype=pl.Int32),
        }
    ).sort(["patron", "borrowed_at", "title"]).with_columns(genre=title_genre(pl.col("title")))
    planted = pl.DataFrame(
        planted_rows,
        schema={"patron": pl.String, "kind": pl.String, "group": pl.String, "designed_jaccard": pl.Float64},
        orient="row",
    ).sort(["kind", "group", "patron"], nulls_last=True)
    return events, planted


def title_genre(title: pl.Expr) -> pl.Expr:
    """A title id's genre (module docstring): no random draw, so adding it changes no other column."""
    number = title.str.slice(1).cast(pl.Int64, strict=False)
    names = pl.lit(pl.Series(GENRE_NAMES))
    return (pl.when(title.str.starts_with("S")).then(pl.lit("summer"))
            .when(title.str.starts_with("L")).then(pl.lit("local history"))
            .otherwise(names.get(number % GENRES)))


def _reader_loans(rng, patrons, sizes, drifter, n_general, n_summer):
    """Loans of ordinary readers: favourite genre (changing at mid-year for drifters),
    power-law popularity within a genre, summer titles in June to August."""
    patron = np.repeat(patrons, sizes)
    n = len(patron)
    month = rng.integers(0, 12, n)
    fav_first = np.repeat(rng.integers(0, GENRES, len(patrons)), sizes)
    shift = np.repeat(np.where(drifter, rng.integers(1, GENRES, len(patrons)), 0), sizes)
    fav = np.where(month >= 6, (fav_first + shift) % GENRES, fav_first)
    genre = np.where(rng.random(n) < 0.7, fav, rng.integers(0, GENRES, n))
    per_genre = n_general // GENRES
    # Power-law rank within genre: P(rank > r) ~ r^-0.6, via inverse transform.
    rank = np.minimum((rng.random(n) ** (-1 / 0.6)).astype(np.int64) - 1, per_genre - 1)
    idx = rank * GENRES + genre
    title = np.char.add("T", np.char.zfill(idx.astype(str), 6))
    summer = (month >= 5) & (month <= 7) & (rng.random(n) < 0.25)
    s_idx = np.minimum((rng.random(summer.sum()) ** (-1 / 0.8)).astype(np.int64) - 1, n_summer - 1)
    title[summer] = np.char.add("S", np.char.zfill(s_idx.astype(str), 6))
    return patron, title, month


def write_demo(out: str | Path, patrons: int = 2000, seed: int = 7) -> dict:
    """Write DIR/events.parquet and DIR/planted.parquet; return a summary. ``out`` must be
    new, empty or an earlier demo's folder (it holds the marker file written here first)."""
    out = demo_folder(out)
    events, planted = generate_events(patrons, seed)
    out.mkdir(parents=True, exist_ok=True)
    (out / DEMO_MARKER).write_text(f"lshjob demo: patrons {patrons}, seed {seed}\n")  # first: a rerun may replace
    for name, frame in (("events.parquet", events), ("planted.parquet", planted)):
        with atomic_file(out / name) as tmp:
            frame.write_parquet(tmp)
    return {
        "events": str(out / "events.parquet"),
        "planted": str(out / "planted.parquet"),
        "patrons": patrons,
        "rows": events.height,
        "titles": events["title"].n_unique(),
        "seed": seed,
    }
