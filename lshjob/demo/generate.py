"""Demo scenario: a fictional public library network (invented data, for demos only).

Patrons borrow titles at branches over the months of 2026. The generator is seeded
and deterministic (numpy's PCG64 stream) and plants structure a test can recover:

* groups of patrons with near-identical reading and a designed Jaccard similarity:
  members share a base list of m titles (the volumes of a few whole series) and each
  adds x titles of their own from the local-history collection, so any two members have Jaccard m / (m + 2x);
* long-tailed title popularity (power law within each of eight genres) and
  long-tailed history sizes (log-normal);
* titles in series: the general collection is numbered in series of :data:`SERIES_LENGTH`
  volumes, and an ordinary reader follows a shelf of a few series (more for a keener
  reader; the first two among the popular series, the others any) from a home branch,
  borrowing most loans from it (first volumes most often) and the rest from the popular
  titles of any genre;
* seasonal reading: summer titles borrowed only in June to August, by everyone who borrows
  then (a quarter of those months' loans);
* regular borrowers: about one ordinary reader in eight borrows 10 to 20 titles a month;
* drifters: nearly half the regular borrowers (45%) move, in a month from April to November, to
  another branch and another part of the catalogue: a new shelf of series in another genre
  (planted with the month, ``changed_at``);
* a skew trap: many patrons whose only loan is the same bestseller;
* a few heavy readers with very large histories (most volumes of about a hundred series).

Each loan's ``genre`` and ``series`` are read off its title id, never drawn: a general title
``T`` numbered idx is of genre idx mod 8 and in series (idx div 8) div :data:`SERIES_LENGTH`
of that genre (the reader loans number them (series * SERIES_LENGTH + volume) * 8 + genre,
the popular ones rank * 8 + genre); ``S`` titles are "summer", ``L`` titles "local history",
their series numbered by idx div :data:`SERIES_LENGTH`.

``planted.parquet`` lists the planted patrons: kind (group, skew_trap, heavy, drifter),
group id, designed Jaccard and, for drifters, the first month of their new reading.
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
SERIES_LENGTH = 12  # volumes of a series
OWN_SHARE = 0.9  # an ordinary reader's loans from its shelf; the rest popular titles of any genre
SUMMER_SHARE = 0.25  # of a reader's loans in June to August: summer titles
REGULAR_SHARE = 0.12  # ordinary readers borrowing 10 to 20 titles a month
DRIFT_SHARE = 0.45  # of regular borrowers: move branch and shelf at a month from April to November
MAX_SHELF = 16  # series on a reader's shelf: one per 15 loans a year, 1 to 16


MAX_PATRONS = 1_000_000  # about 40 million loans; generating 200,000 patrons took 41 s and 3 GiB here


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
    n_series = n_general // GENRES // SERIES_LENGTH  # series per genre

    pieces: list[tuple] = []  # (patron, title, month, moved to another branch)
    sizes = np.clip(np.round(rng.lognormal(2.6, 0.9, n_regular)), 1, 400).astype(np.int64)
    steady = rng.random(n_regular) < REGULAR_SHARE
    sizes[steady] = rng.integers(10 * 12, 20 * 12 + 1, int(steady.sum()))
    drifter = steady & (rng.random(n_regular) < DRIFT_SHARE)
    change = np.where(drifter, rng.integers(3, 11, n_regular), 12)  # 0-based month of the move
    pieces.append(_reader_loans(rng, regular, sizes, change, n_general, n_summer))
    for p in heavy:  # heavy readers borrow most volumes of about a hundred series, all genres
        size = int(rng.integers(800, 1500))
        shelf = rng.choice(n_series * GENRES, size=-(-size * 6 // (5 * SERIES_LENGTH)), replace=False)
        every = ((shelf[:, None] % n_series * SERIES_LENGTH + np.arange(SERIES_LENGTH)) * GENRES
                 + shelf[:, None] // n_series).ravel()
        picks = rng.choice(every, size=size, replace=False)
        titles = np.char.add("T", np.char.zfill(picks.astype(str), 6))
        pieces.append((np.full(len(titles), p), titles, rng.integers(0, 12, len(titles)), np.zeros(len(titles), bool)))
    pieces.append((skew, np.full(n_skew, BESTSELLER), rng.integers(0, 12, n_skew), np.zeros(n_skew, bool)))

    month_start = np.array([f"{YEAR}-{m:02d}-01" for m in range(1, 13)], dtype="datetime64[D]")
    planted_rows = [(p, "skew_trap", None, None, None) for p in skew]
    planted_rows += [(p, "heavy", None, None, None) for p in heavy]
    planted_rows += [(p, "drifter", None, None, month_start[c].item())
                     for p, c in zip(regular[drifter], change[drifter])]
    start, own_next = 0, 0
    for g, size in enumerate(group_sizes):
        m, x = GROUP_DESIGNS[g % len(GROUP_DESIGNS)]
        members = grouped[start : start + size]
        start += size
        series = rng.choice(n_series * GENRES, size=-(-m // SERIES_LENGTH), replace=False)  # whole series
        volumes = ((series[:, None] % n_series * SERIES_LENGTH + np.arange(SERIES_LENGTH)) * GENRES
                   + series[:, None] // n_series).ravel()[:m]
        base = [f"T{t:06d}" for t in volumes]
        for p in members:
            own = [f"L{own_next + i:06d}" for i in range(x)]
            own_next += x
            titles = np.array(base + own)
            pieces.append((np.full(len(titles), p), titles, rng.integers(0, 12, len(titles)),
                           np.zeros(len(titles), bool)))
            planted_rows.append((p, "group", f"G{g:04d}", m / (m + 2 * x), None))

    patron = np.concatenate([p[0] for p in pieces])
    title = np.concatenate([p[1] for p in pieces])
    month = np.concatenate([p[2] for p in pieces])
    moved = np.concatenate([p[3] for p in pieces])
    n = len(patron)
    home_index = np.searchsorted(np.sort(names), patron)  # stable per patron name
    home_index = np.where(moved, home_index + 1 + home_index // len(BRANCHES) % (len(BRANCHES) - 1), home_index)
    branch_idx = np.where(rng.random(n) < 0.2, rng.integers(0, len(BRANCHES), n), home_index % len(BRANCHES))
    branch = np.array(BRANCHES)[branch_idx]
    borrowed_at = (
        month_start.astype("datetime64[us]")[month]
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
    ).sort(["patron", "borrowed_at", "title"]).with_columns(genre=title_genre(pl.col("title")),
                                                            series=title_series(pl.col("title")))
    planted = pl.DataFrame(
        planted_rows,
        schema={"patron": pl.String, "kind": pl.String, "group": pl.String, "designed_jaccard": pl.Float64,
                "changed_at": pl.Date},
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


def title_series(title: pl.Expr) -> pl.Expr:
    """A title id's series (module docstring), e.g. "crime 12", "summer 3", "local history 40"."""
    number = title.str.slice(1).cast(pl.Int64, strict=False)
    within = pl.when(title.str.starts_with("T")).then(number // GENRES).otherwise(number)
    return title_genre(title) + pl.lit(" ") + (within // SERIES_LENGTH).cast(pl.String)


def _power_law(rng, n: int, size, exponent: float) -> np.ndarray:
    """Ranks 0..n-1 with P(rank > r) ~ r^-exponent (inverse transform)."""
    return np.minimum((rng.random(size) ** (-1 / exponent)).astype(np.int64) - 1, n - 1)


def _reader_loans(rng, patrons, sizes, change, n_general, n_summer):
    """Loans of ordinary readers over the year: from a shelf of series (one series per 15 loans a
    year, 1 to :data:`MAX_SHELF`; the first two popular series, the others uniform; most in a
    favourite genre; a series' first volumes borrowed most) with
    probability :data:`OWN_SHARE`, otherwise a popular title of any genre; summer titles in
    June to August. From month ``change`` on (12: never) a reader reads from a second shelf,
    in another favourite genre, at another branch (the last array: moved)."""
    count = len(patrons)
    per_genre = n_general // GENRES
    n_series = per_genre // SERIES_LENGTH
    shelf_size = np.clip(np.ceil(sizes / 15), 1, MAX_SHELF).astype(np.int64)
    favourite = rng.integers(0, GENRES, count)
    favourites = np.stack([favourite, (favourite + rng.integers(1, GENRES, count)) % GENRES], axis=1)
    shape = (count, 2, MAX_SHELF)
    genre = np.where(rng.random(shape) < 0.8, favourites[:, :, None], rng.integers(0, GENRES, shape))
    genre[:, 1] = favourites[:, 1:]  # the second shelf: all in the new favourite genre
    series = rng.integers(0, n_series, shape)
    series[:, :, :2] = _power_law(rng, n_series, (count, 2, 2), 0.5)  # the first two: popular series
    shelves = genre * n_series + series  # genre * n_series + series

    who = np.repeat(np.arange(count), sizes)
    n = len(who)
    month = rng.integers(0, 12, n)
    moved = month >= change[who]
    place = (rng.random(n) * shelf_size[who]).astype(np.int64)
    code = shelves[who, moved.astype(np.int64), place]
    idx = ((code % n_series) * SERIES_LENGTH + _power_law(rng, SERIES_LENGTH, n, 1.0)) * GENRES + code // n_series
    popular = rng.random(n) >= OWN_SHARE
    n_popular = int(popular.sum())
    idx[popular] = _power_law(rng, per_genre, n_popular, 0.6) * GENRES + rng.integers(0, GENRES, n_popular)
    title = np.char.add("T", np.char.zfill(idx.astype(str), 6))
    summer = (month >= 5) & (month <= 7) & (rng.random(n) < SUMMER_SHARE)
    s_idx = _power_law(rng, n_summer, int(summer.sum()), 0.8)
    title[summer] = np.char.add("S", np.char.zfill(s_idx.astype(str), 6))
    return patrons[who], title, month, moved


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
