"""The planner's sample under a visit budget: who is visited, what their pairs count for, and
that the weighted histogram still stands for the whole uniform sample."""

from itertools import combinations

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.plan import similarity
from lshjob.plan.similarity import HISTOGRAM_BINS, sample_histogram_from_sets, visit_chances


def long_tailed_sets(n: int, seed: int) -> ElementSets:
    """Sets of 1 to 8 elements drawn with Zipf-like popularity (exponent 1.2), as the
    long-tailed benchmark draws them: a few elements held by most sets."""
    rng = np.random.default_rng(seed)
    ranks = np.arange(1, 301, dtype=np.float64)
    popularity = ranks**-1.2 / (ranks**-1.2).sum()
    rows = []
    for e in range(n):
        for x in np.unique(rng.choice(300, int(rng.integers(1, 9)), p=popularity)):
            rows.append((e, int(x) * 7919 - 1000))  # codes neither dense nor positive
    return ElementSets.from_sets(pl.DataFrame(rows, schema={"entity": pl.Int64, "element": pl.Int64}, orient="row"))


def python_sets(sets: ElementSets) -> list[set]:
    return [set(sets.elements[sets.offsets[i]:sets.offsets[i + 1]].tolist()) for i in range(sets.size)]


def test_visit_chances_spend_the_budget_exactly():
    # Oracle: the expected visits sum(chance * cost) by plain arithmetic, and the cap c0 found
    # apart by bisection on sum(min(cost, c0)) = budget.
    costs = np.random.default_rng(4).pareto(1.1, 500) * 1000 + 1
    budget = costs.sum() / 7
    chance = visit_chances(costs, budget)
    assert (chance * costs).sum() == pytest.approx(budget, rel=1e-9)
    lo, hi = 0.0, costs.max()
    for _ in range(200):
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if np.minimum(costs, mid).sum() > budget else (mid, hi)
    assert chance == pytest.approx(np.minimum(1.0, lo / costs), rel=1e-9)
    assert visit_chances(costs, costs.sum()).tolist() == [1.0] * 500  # all fit: all visited


def test_budgeted_histogram_is_the_weighted_brute_force_of_the_visited(monkeypatch):
    # Oracle: brute force with Python sets over the same draws (the seed's permutation, then
    # its uniform numbers against the chances): every visited entity against every other
    # entity, each pair counted 1 / chance of the visited one.
    sets = long_tailed_sets(600, seed=8)
    members = python_sets(sets)
    m, seed = 150, 3
    rng = np.random.default_rng(seed)
    order = rng.permutation(sets.size)[:m]
    holders = {}
    for s in members:
        for x in s:
            holders[x] = holders.get(x, 0) + 1
    costs = np.array([sum(holders[x] for x in members[a]) for a in order], dtype=np.float64)
    budget = costs.sum() / 5
    monkeypatch.setattr(similarity, "AGAINST_ALL_BUDGET", budget)
    monkeypatch.setattr(similarity, "MIN_AGAINST_ALL", 20)
    chance = visit_chances(costs, budget)
    assert chance.min() < 0.5  # the budget bites: popular sets are visited with a small chance
    visited = rng.random(m) < chance

    counts = np.zeros(2 * HISTOGRAM_BINS)
    identical = 0.0
    for a, w in zip(order[visited], 1.0 / chance[visited]):
        for b in range(sets.size):
            inter = len(members[a] & members[b])
            if b == a or inter == 0:
                continue
            jac = inter / len(members[a] | members[b])
            if jac == 1.0:
                identical += w
            else:
                counts[2 * min(int(jac * HISTOGRAM_BINS), HISTOGRAM_BINS - 1) + (jac >= 0.5)] += w

    hist = sample_histogram_from_sets(sets, m, seed=seed, threshold=0.5)
    assert hist.design == "against_all" and hist.sample_entities == m
    assert hist.visited_entities == int(visited.sum()) < m
    assert hist.identical_pairs == pytest.approx(identical)
    assert hist.counts == pytest.approx(counts[counts > 0])
    assert hist.pairs_at_or_above(0.5) == pytest.approx(counts[1::2].sum())


def test_budgeted_histogram_estimates_the_population_without_bias(monkeypatch):
    # Oracle: the population's pairs at or above 0.5 by brute force over Python sets; the
    # mean of the weighted estimates over many seeds must fall within 4 standard errors.
    sets = long_tailed_sets(400, seed=5)
    members = python_sets(sets)
    truth = sum(1 for a, b in combinations(members, 2) if a != b and len(a & b) / len(a | b) >= 0.5)
    assert truth > 100
    monkeypatch.setattr(similarity, "AGAINST_ALL_BUDGET", 8000.0)  # about a quarter of the 100 sets' visits
    monkeypatch.setattr(similarity, "MIN_AGAINST_ALL", 20)
    estimates, visited = [], []
    for seed in range(80):
        hist = sample_histogram_from_sets(sets, 100, seed=seed, threshold=0.5)
        estimates.append(hist.pairs_at_or_above(0.5) * hist.scale)
        visited.append(hist.visited_entities)
    assert max(visited) < 100
    estimates = np.array(estimates)
    assert abs(estimates.mean() - truth) < 4 * estimates.std(ddof=1) / np.sqrt(len(estimates))


@pytest.mark.parametrize("share", [0.0, 0.05, 1.0])
def test_wanted_postings_list_every_holder_in_order(share):
    # Oracle: a Python dict of code -> entities holding it, filled set by set; codes span the
    # int64 range (negative, extreme), sets may be empty.
    from lshjob.plan._postings import wanted_postings

    rng = np.random.default_rng(17)
    pool = np.concatenate([rng.integers(-2**63, 2**63 - 1, 2000, dtype=np.int64),
                           np.array([-2**63, 2**63 - 1, 0, -1], dtype=np.int64)])
    sets = []
    for _ in range(900):
        sets.append(sorted(set(rng.choice(pool, int(rng.integers(0, 30))).tolist())))
    offsets = np.concatenate([[0], np.cumsum([len(s) for s in sets])]).astype(np.int64)
    elements = np.array([x for s in sets for x in s], dtype=np.int64)
    wanted = np.unique(rng.choice(pool, int(share * len(pool))) if share < 1 else pool)

    starts, members = wanted_postings(offsets, elements, wanted)

    holders = {int(x): [] for x in wanted}
    for i, s in enumerate(sets):
        for x in s:
            if x in holders:
                holders[x].append(i)
    assert members.dtype == np.int32 and len(starts) == len(wanted) + 1
    for p, x in enumerate(wanted.tolist()):
        assert members[starts[p]:starts[p + 1]].tolist() == holders[x]


def test_crowd_split_counts_each_row_by_its_weight():
    # Oracle: the same histogram with each sampled entity's row repeated by hand as many times
    # as its (whole-number) weight, no weights; then the crowd shares must agree, and differ
    # from the unweighted rows (the heavy entity sits in a crowd, the others do not).
    from lshjob.plan.banding import PairHistogram, crowd_split

    rng = np.random.default_rng(2)
    rows = rng.integers(0, 5, (4, 50)).astype(np.float64)
    rows[2, 45:] = 400  # many near-identical partners: a crowd at r = 4
    weights = np.array([1.0, 3.0, 5.0, 2.0])
    base = dict(similarity=np.array([0.5]), counts=np.array([1.0]), sample_entities=4, total_entities=100,
                design="against_all")
    weighted = PairHistogram(**base, entity_pairs=rows, entity_weights=weights)
    repeated = PairHistogram(**base, entity_pairs=np.repeat(rows, weights.astype(int), axis=0))
    plain = PairHistogram(**base, entity_pairs=rows)
    assert crowd_split(weighted, 40, 4, 64) == pytest.approx(crowd_split(repeated, 40, 4, 64), rel=1e-12)
    assert 0 < crowd_split(weighted, 40, 4, 64) < 1
    assert crowd_split(weighted, 40, 4, 64) != pytest.approx(crowd_split(plain, 40, 4, 64), rel=1e-3)


def test_budget_rises_until_enough_are_visited(monkeypatch):
    # Oracle: the rule as documented: with a budget of one visit, far too small, the budget is
    # raised until about 1.5 x the minimum are visited, and the sample is still paired with
    # all entities (not within itself, which a cut at one visit would force).
    sets = long_tailed_sets(600, seed=8)
    monkeypatch.setattr(similarity, "AGAINST_ALL_BUDGET", 1.0)
    monkeypatch.setattr(similarity, "MIN_AGAINST_ALL", 40)
    hist = sample_histogram_from_sets(sets, 150, seed=3, threshold=0.5)
    assert hist.design == "against_all"
    assert 40 <= hist.visited_entities < 150
