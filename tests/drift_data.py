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


def _popular(rng, n: int, size, exponent: float = 0.7) -> np.ndarray:
    """Ranks 0..n-1 with a power-law tail: P(rank > r) ~ r^-exponent."""
    return np.minimum((rng.random(size) ** (-1 / exponent)).astype(np.int64) - 1, n - 1)


def _first_distinct(codes: np.ndarray, want: np.ndarray) -> np.ndarray:
    """Mask of the first ``want[i]`` distinct values of each row of ``codes``, in row order."""
    order = np.argsort(codes, axis=1, kind="stable")
    ranked = np.take_along_axis(codes, order, axis=1)
    first_sorted = np.ones(codes.shape, dtype=bool)
    first_sorted[:, 1:] = ranked[:, 1:] != ranked[:, :-1]
    first = np.empty(codes.shape, dtype=bool)
    np.put_along_axis(first, order, first_sorted, axis=1)
    return first & (np.cumsum(first, axis=1) <= want[:, None])


def library_months(patrons: int = 2000, months: int = 12, drift_rate: float = 0.05, seed: int = 0,
                   per_month: tuple[int, int] = (5, 10), shelf: tuple[int, int] = (10, 14),
                   own_share: float = 0.9, season: bool = False, summer_share: float = 0.4,
                   first_change: int = 3) -> tuple[pl.DataFrame, pl.DataFrame]:
    """(events: patron, author, borrowed_at; planted: patron, change_month (Date or null))."""
    rng = np.random.default_rng(seed)
    names = np.array([f"P{i:06d}" for i in range(patrons)])
    drifts = rng.random(patrons) < drift_rate
    change = np.where(drifts, rng.integers(first_change, months, patrons), months)
    starts = np.array([dt.date(2026 + m // 12, m % 12 + 1, 1) for m in range(months)], dtype="datetime64[D]")

    # two shelves per patron (before and after a change), favourite first, codes g * 1000 + author
    genre = rng.integers(0, GENRES, patrons)
    genres = np.stack([genre, (genre + rng.integers(1, GENRES, patrons)) % GENRES], axis=1)
    size = rng.integers(shelf[0], shelf[1] + 1, (patrons, 2))
    width = shelf[1]
    picks = np.concatenate([_popular(rng, AUTHORS_PER_GENRE, (patrons * 2, 6 * width)),
                            rng.integers(0, AUTHORS_PER_GENRE, (patrons * 2, 4 * width))], axis=1)
    keep = _first_distinct(picks, np.full(patrons * 2, width))
    shelves = (genres.reshape(-1, 1) * 1000 + picks[keep].reshape(patrons * 2, width)).reshape(patrons, 2, width)

    # one row per patron-month, `draws` candidate loans each; the first `want` distinct are kept
    draws = 4 * per_month[1]
    pid = np.repeat(np.arange(patrons), months)
    month = np.tile(np.arange(months), patrons)
    side = (month >= change[pid]).astype(np.int64)
    shape = (len(pid), draws)
    weights = np.cumsum(1.0 / np.arange(1, width + 1))  # favourite authors first: 1 / (place + 1)
    n_own = size[pid, side]
    place = np.minimum(np.searchsorted(weights, rng.random(shape) * weights[n_own - 1][:, None]), n_own[:, None] - 1)
    codes = shelves[pid[:, None], side[:, None], place]
    other = rng.random(shape) >= own_share
    codes = np.where(other, rng.integers(0, GENRES, shape) * 1000 + _popular(rng, AUTHORS_PER_GENRE, shape), codes)
    if season:
        holiday = np.isin(month % 12, SUMMER)[:, None] & (rng.random(shape) < summer_share)
        codes = np.where(holiday, 100_000 + _popular(rng, 300, shape), codes)
    want = rng.integers(per_month[0], per_month[1] + 1, len(pid))
    keep = _first_distinct(codes, want)
    row, col = np.nonzero(keep)
    code = codes[row, col]
    author = np.where(code >= 100_000, np.char.add("S-", np.char.zfill((code - 100_000).astype(str), 3)),
                      np.char.add(np.char.add("A", (code // 1000).astype(str)),
                                  np.char.add("-", np.char.zfill((code % 1000).astype(str), 3))))
    day = starts[month[row]] + rng.integers(0, 28, len(row)).astype("timedelta64[D]")
    events = pl.DataFrame({"patron": names[pid[row]], "author": author, "borrowed_at": pl.Series(day).cast(pl.Date)})
    planted = pl.DataFrame({
        "patron": names,
        "change_month": pl.Series(np.where(change < months, starts[np.minimum(change, months - 1)],
                                           np.datetime64("NaT"))).cast(pl.Date),
    })
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
