"""The library demo: deterministic, and its planted structure is really there."""

import itertools

import polars as pl

from lshjob.demo.generate import BESTSELLER, generate_events


def test_same_seed_same_events_other_seed_other_events(demo_events):
    events, planted = demo_events
    again, planted_again = generate_events(1000, seed=11)
    assert events.equals(again) and planted.equals(planted_again)
    assert not events.equals(generate_events(1000, seed=12)[0])


def test_planted_groups_have_their_designed_jaccard(demo_events):
    # Oracle: exact Jaccard by set intersection of each member pair's titles.
    events, planted = demo_events
    sets = {p: set(t) for p, t in events.group_by("patron").agg("title").iter_rows()}
    groups = planted.filter(pl.col("kind") == "group").group_by("group").agg("patron", pl.first("designed_jaccard"))
    assert groups.height >= 5
    for _, members, designed in groups.iter_rows():
        assert len(members) >= 3
        for a, b in itertools.combinations(members, 2):
            assert abs(len(sets[a] & sets[b]) / len(sets[a] | sets[b]) - designed) < 1e-12


def test_skew_trap_heavy_readers_and_long_tail(demo_events):
    events, planted = demo_events
    sizes = events.group_by("patron").agg(pl.col("title").n_unique().alias("n"))
    trap = planted.filter(pl.col("kind") == "skew_trap")["patron"]
    assert trap.len() >= 50
    trapped = events.filter(pl.col("patron").is_in(trap.implode()))
    assert trapped["title"].unique().to_list() == [BESTSELLER]
    heavy = sizes.filter(pl.col("patron").is_in(planted.filter(pl.col("kind") == "heavy")["patron"].implode()))
    assert heavy["n"].min() >= 800
    # Long tail: the most borrowed title has far more loans than the median title.
    pop = events.group_by("title").len()["len"]
    assert pop.max() > 20 * pop.median()


def test_seasonal_titles_only_in_summer(demo_events):
    events, _ = demo_events
    months = events.filter(pl.col("title").str.starts_with("S"))["borrowed_at"].dt.month().unique().sort()
    assert months.to_list() == [6, 7, 8]
