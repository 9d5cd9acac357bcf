"""The library demo by genre: the genre column, the drift its planted drifters carry, and what
lshjob drift makes of it (the issue's demo check, not met: see the expected failure below)."""

import numpy as np
import polars as pl
import pytest
from scipy.special import logsumexp

from lshjob.demo.generate import GENRE_NAMES, GENRES, generate_events
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.drift import drift_file
from lshjob.jobs.sign import sign_file
from lshjob.sign.signatures import SignatureParams

SEEDS = (2026, 7)
PATRONS = 1200


@pytest.fixture(scope="module", params=SEEDS)
def demo(request):
    return generate_events(PATRONS, request.param)


def _genre_by_hand(title: str) -> str:
    return {"S": "summer", "L": "local history"}.get(title[0]) or GENRE_NAMES[int(title[1:]) % GENRES]


def test_genre_is_read_off_the_title_and_the_sample_is_the_generators():
    # Oracle: the title id parsed in Python (T idx -> idx mod 8, the reader loans' numbering
    # rank * 8 + genre); demo_data/loans.parquet is generate_events(1200, seed=2026) itself.
    events, _ = generate_events(300, seed=3)
    assert events["genre"].to_list() == [_genre_by_hand(t) for t in events["title"].to_list()]
    sample = pl.read_parquet("demo_data/loans.parquet")
    assert sample.equals(generate_events(1200, seed=2026)[0])


def _half_year_counts(events: pl.DataFrame, readers: list[str]) -> np.ndarray:
    code = {g: i for i, g in enumerate(GENRE_NAMES)}
    x = (events.filter(pl.col("patron").is_in(readers) & pl.col("genre").is_in(GENRE_NAMES))
         .with_columns(half=(pl.col("borrowed_at").dt.month() >= 7).cast(pl.Int64),
                       g=pl.col("genre").replace_strict(code, return_dtype=pl.Int64))
         .group_by("patron", "half", "g").len())
    where = {p: i for i, p in enumerate(readers)}
    counts = np.zeros((len(readers), 2, GENRES))
    for patron, half, g, n in x.iter_rows():
        counts[where[patron], half, g] = n
    return counts


def test_drifters_with_loans_in_both_halves_show_their_change(demo):
    # Oracle: planted.parquet (kind drifter). The likelihood ratio "favourite genre changed at
    # July" / "same favourite" under the generator's model (favourite with probability
    # 0.7 + 0.3/8, each other genre 0.3/8; summed over favourites), from exact genre counts,
    # separates drifters from other ordinary readers with at least 4 general loans in each
    # half year (Bayes' decision: posterior odds above 1): the signal a drift rule could find is
    # in the genre column.
    events, planted = demo
    drifters = set(planted.filter(pl.col("kind") == "drifter")["patron"])
    readers = sorted(set(events["patron"]) - (set(planted["patron"]) - drifters))
    counts = _half_year_counts(events, readers)
    keep = counts.sum(2).min(1) >= 4
    a, b = np.log(0.7 + 0.3 / GENRES), np.log(0.3 / GENRES)
    ll = [c * a + (c.sum(1, keepdims=True) - c) * b for c in (counts[keep, 0], counts[keep, 1])]
    pair = ll[0][:, :, None] + ll[1][:, None, :]
    pair[:, np.arange(GENRES), np.arange(GENRES)] = -np.inf
    lr = logsumexp(pair.reshape(len(ll[0]), -1), axis=1) - np.log(GENRES - 1) - logsumexp(ll[0] + ll[1], axis=1)
    truth = np.array([p in drifters for p in readers])[keep]
    flagged = lr > np.log(0.95 / 0.05)  # posterior above 1/2 at the generator's drifter rate, 5%
    precision, recall = truth[flagged].mean(), flagged[truth].mean()
    assert truth.sum() >= 20 and precision >= 0.9 and recall >= 0.9, (truth.sum(), precision, recall)


@pytest.mark.xfail(strict=True, raises=AssertionError, reason=(
    "monthly genre sets hold one or two genres; a favourite's change shows in the genres' shares, "
    "which sets (and their signatures) do not keep (bench/drift_demo.py)"))
def test_drift_finds_the_demo_drifters_by_genre(tmp_path, demo):
    # Oracle: planted.parquet (kind drifter). A patron counts as flagged if any of its rows is.
    # Summer readers: patrons with at least one S title. The check: precision and
    # recall at least 0.9, summer readers flagged no more often than the population.
    events, planted = demo
    events.write_parquet(tmp_path / "loans.parquet")
    spec = EventSpec(entity="patron", element="genre", time="borrowed_at", period="month")
    sign_file(tmp_path / "loans.parquet", tmp_path / "monthly.parquet", spec, SignatureParams())
    rows, _ = drift_file(tmp_path / "monthly.parquet", tmp_path / "drift.parquet", history=6)
    drifters = set(planted.filter(pl.col("kind") == "drifter")["patron"])
    flagged = set(rows.filter("flagged")["entity"])
    precision = len(flagged & drifters) / max(1, len(flagged))
    recall = len(flagged & drifters) / len(drifters)
    summer = set(events.filter(pl.col("genre") == "summer")["patron"])
    population = set(rows["entity"])
    rate = len(flagged & population) / len(population)
    summer_rate = len(flagged & summer) / len(summer)
    assert precision >= 0.9 and recall >= 0.9 and summer_rate <= rate, (precision, recall, summer_rate, rate)
