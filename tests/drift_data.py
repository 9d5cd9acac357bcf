"""Test data for drift: patrons of the fictional library network borrowing authors month by
month (invented, for tests only).

Each patron reads from a personal shelf of favourite authors in one genre (most loans) and
from the network's popular authors (the rest). A planted drifter moves to another genre's
shelf from its change month on. With ``season``, every patron borrows part of each summer
month's loans from a shared pool of holiday authors (a change of everyone). Sets per month
are small on purpose (``per_month`` distinct authors, 5 to 10 by default), so a patron's
similarity to last month is noisy even when nothing changed.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl

GENRES = 8
AUTHORS_PER_GENRE = 400
SUMMER = (5, 6, 7)  # June to August (0-based months)


def _popular(rng, n: int, size: int, exponent: float = 0.7) -> np.ndarray:
    """Ranks 0..n-1 with a power-law tail: P(rank > r) ~ r^-exponent."""
    return np.minimum((rng.random(size) ** (-1 / exponent)).astype(np.int64) - 1, n - 1)


def library_months(patrons: int = 2000, months: int = 12, drift_rate: float = 0.05, seed: int = 0,
                   per_month: tuple[int, int] = (5, 10), shelf: tuple[int, int] = (10, 14),
                   own_share: float = 0.9, season: bool = False, summer_share: float = 0.4,
                   first_change: int = 3) -> tuple[pl.DataFrame, pl.DataFrame]:
    """(events: patron, author, borrowed_at; planted: patron, change_month (Date or null))."""
    rng = np.random.default_rng(seed)
    names = [f"P{i:06d}" for i in range(patrons)]
    drifts = rng.random(patrons) < drift_rate
    change = np.where(drifts, rng.integers(first_change, months, patrons), -1)
    starts = [dt.date(2026 + m // 12, m % 12 + 1, 1) for m in range(months)]
    out_p, out_a, out_t = [], [], []

    def shelf_of(genre):
        size = int(rng.integers(shelf[0], shelf[1] + 1))
        picks = np.unique(_popular(rng, AUTHORS_PER_GENRE, 4 * size))[:size]
        while len(picks) < size:  # rare: too few distinct picks
            picks = np.unique(np.append(picks, rng.integers(0, AUTHORS_PER_GENRE)))
        return [f"A{genre}-{int(a):03d}" for a in picks]

    for p in range(patrons):
        genre = int(rng.integers(0, GENRES))
        own = shelf_of(genre)
        for m in range(months):
            if m == change[p]:
                own = shelf_of((genre + int(rng.integers(1, GENRES))) % GENRES)
            want = int(rng.integers(per_month[0], per_month[1] + 1))
            picked: set[str] = set()
            tries = 0
            while len(picked) < want and tries < 200:
                tries += 1
                u = rng.random()
                if season and m % 12 in SUMMER and u < summer_share:
                    picked.add(f"S-{int(_popular(rng, 300, 1)[0]):03d}")
                elif rng.random() < own_share:  # favourite authors first: weights 1 / (place + 1)
                    weights = 1.0 / np.arange(1, len(own) + 1)
                    picked.add(own[int(np.searchsorted(np.cumsum(weights), rng.random() * weights.sum()))])
                else:
                    g = int(rng.integers(0, GENRES))
                    picked.add(f"A{g}-{int(_popular(rng, AUTHORS_PER_GENRE, 1)[0]):03d}")
            for a in sorted(picked):
                out_p.append(names[p])
                out_a.append(a)
                out_t.append(starts[m] + dt.timedelta(days=int(rng.integers(0, 28))))
    events = pl.DataFrame({"patron": out_p, "author": out_a, "borrowed_at": out_t})
    planted = pl.DataFrame({
        "patron": names,
        "change_month": [starts[c] if c >= 0 else None for c in change],
    }, schema={"patron": pl.String, "change_month": pl.Date})
    return events, planted


def exact_periods(events: pl.DataFrame) -> pl.DataFrame:
    """Each patron's set of authors per month (polars), as lists: patron, period, authors."""
    return (events.with_columns(period=pl.col("borrowed_at").dt.truncate("1mo").cast(pl.Date))
            .group_by("patron", "period").agg(authors=pl.col("author").unique().sort())
            .sort("patron", "period"))


def entity_scores(rows: pl.DataFrame, planted: pl.DataFrame, flag: pl.Expr) -> tuple[float, float]:
    """(precision, recall) of a flag over drift rows: an entity is reported when any of its
    periods is flagged; a drifter counts as found when its change month is flagged."""
    flagged = rows.filter(flag)
    reported = set(flagged["entity"].to_list())
    drifters = planted.filter(pl.col("change_month").is_not_null())
    truth = set(drifters["patron"].to_list())
    at_change = flagged.join(drifters.rename({"patron": "entity", "change_month": "period"}),
                             on=["entity", "period"], how="inner")
    found = set(at_change["entity"].to_list())
    precision = len(reported & truth) / len(reported) if reported else 1.0
    recall = len(found) / len(truth) if truth else 1.0
    return precision, recall
