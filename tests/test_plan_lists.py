"""The planner's recall of the published top-k lists (``--recall-of lists``):
predicted from each sampled entity's pairs, checked against brute force with Python sets and
against runs measured the same way."""

import json

import numpy as np
import polars as pl
import pytest
from test_plan_crowds import long_tailed, python_sets
from typer.testing import CliRunner

from lshjob import EventSpec
from lshjob.cli.app import app
from lshjob.errors import ParameterError
from lshjob.ingest.loading import load_membership
from lshjob.jobs.run import RunOptions, run_job
from lshjob.plan import similarity
from lshjob.plan.banding import (
    LIST_BOUND_Z,
    PairHistogram,
    candidate_probability,
    data_plans,
    list_recall,
    list_recall_bound,
)

SPEC = EventSpec(entity="patron", element="title")
N, SAMPLE, THRESHOLD, TOP_K = 3000, 250, 0.5, 5


@pytest.fixture(scope="module")
def loans(tmp_path_factory):
    path, events = tmp_path_factory.mktemp("lists") / "loans.parquet", long_tailed(N, seed=3, median=3.0, exponent=1.4)
    events.write_parquet(path)
    return path, events


@pytest.fixture(scope="module")
def hist(loans):
    sets = load_membership(loans[0], SPEC)[0]
    return similarity.sample_histogram_from_sets(sets, SAMPLE, seed=0, threshold=THRESHOLD)


def true_lists(events: pl.DataFrame, picked: list[str], top_k: int) -> list[np.ndarray]:
    """Brute force with Python sets: each picked patron's top-k Jaccard values >= the threshold."""
    sets = python_sets(events)
    lists = []
    for a in picked:
        js = np.array([len(sets[a] & t) / len(sets[a] | t) for b, t in sets.items() if b != a])
        lists.append(np.sort(js[js >= THRESHOLD])[::-1][:top_k])
    return lists


def test_list_recall_matches_brute_force_of_the_sampled_lists(loans, hist):
    # Oracle: Python sets, exact Jaccard of the same sampled patrons against all; a list place
    # is found with the S-curve's chance 1 - (1 - s^r)^b (MMDS section 3.4), identical sets
    # always (they are paired before banding).
    assert hist.visited_entities == SAMPLE and hist.entity_lists is not None  # all visited, weight 1
    keys = sorted(python_sets(loans[1]))
    picked = [keys[i] for i in np.sort(np.random.default_rng(0).permutation(len(keys))[:SAMPLE])]
    lists = true_lists(loans[1], picked, TOP_K)
    places = sum(len(v) for v in lists)
    assert places > 200 and sum((v >= 1.0).sum() for v in lists) > 20  # identical and similar sets both
    for bands, rows in [(5, 4), (12, 4), (20, 5), (8, 2)]:
        found = sum(np.where(v >= 1.0, 1.0, candidate_probability(v, bands, rows)).sum() for v in lists)
        # bins of (1 - t) / 100 stand for each pair's similarity
        assert list_recall(hist, TOP_K, bands, rows) == pytest.approx(found / places, abs=0.01)
    assert list_recall(hist, TOP_K, 5, 4) < list_recall(hist, TOP_K, 12, 4)  # more bands, more found


def test_list_recall_takes_the_top_of_each_list_first():
    # Oracle: the definition worked by hand. One entity, threshold 0.5, 4 bins of [0.5, 1):
    # 1 identical set, 2 pairs in the top bin (midpoint 0.9375), 5 in the lowest (0.5625).
    # A top-3 list holds the identical set and the two top pairs; a top-5 list two low ones more.
    row = np.array([[1.0, 5.0, 0.0, 0.0, 2.0]])
    h = PairHistogram(similarity=np.array([0.6]), counts=np.array([1.0]), sample_entities=1, total_entities=10,
                      design="against_all", threshold=0.5, entity_lists=row)
    hi, lo = candidate_probability(0.9375, 3, 2), candidate_probability(0.5625, 3, 2)
    assert list_recall(h, 3, 3, 2) == pytest.approx((1 + 2 * hi) / 3)
    assert list_recall(h, 5, 3, 2) == pytest.approx((1 + 2 * hi + 2 * lo) / 5)
    assert list_recall(h, 50, 3, 2) == pytest.approx((1 + 2 * hi + 5 * lo) / 8)  # shorter than k: all
    weighted = PairHistogram(**{**h.__dict__, "entity_lists": np.vstack([row, [[0.0, 4.0, 0, 0, 0]]]),
                                "entity_weights": np.array([1.0, 3.0])})
    assert list_recall(weighted, 3, 3, 2) == pytest.approx((1 + 2 * hi + 3 * 3 * lo) / (3 + 3 * 3))


def test_plans_meet_the_target_on_lists_or_on_pairs(hist):
    # Lists favour the most similar pairs, which the S-curve finds most often, so a plan meets
    # the same target on lists with fewer bands (fewer candidates) than on every pair.
    on_pairs = data_plans(THRESHOLD, hist, (128,), 0.95)[0]
    on_lists = data_plans(THRESHOLD, hist, (128,), 0.95, TOP_K)[0]
    assert on_pairs.expected_list_recall is None and on_pairs.expected_recall >= 0.95
    assert on_lists.expected_list_recall >= 0.95
    assert on_lists.expected_list_recall == pytest.approx(list_recall(hist, TOP_K, on_lists.bands, on_lists.rows))
    assert on_lists.expected_candidates < on_pairs.expected_candidates


def test_list_recall_bound_is_its_estimate_less_a_bootstrap_standard_error(hist):
    # Oracle: the bootstrap (Efron and Tibshirani, An Introduction to the Bootstrap, 1993,
    # chapter 6): the sampled entities drawn again with replacement, each keeping its weight,
    # and list_recall recomputed; the spread of those estimates is the standard error the
    # bound subtracts LIST_BOUND_Z times (1.645: the normal's 95% quantile, one-sided).
    assert hist.entity_weights is None or len(hist.entity_weights) == len(hist.entity_lists)
    rng = np.random.default_rng(7)
    n = len(hist.entity_lists)
    weights = np.ones(n) if hist.entity_weights is None else hist.entity_weights
    for bands, rows in ((5, 4), (12, 4), (20, 5)):
        estimate = float(list_recall(hist, TOP_K, bands, rows))
        drawn = []
        for _ in range(400):
            pick = rng.integers(0, n, n)
            again = PairHistogram(hist.similarity, hist.counts, hist.sample_entities, hist.total_entities,
                                  threshold=THRESHOLD, entity_lists=hist.entity_lists[pick],
                                  entity_weights=weights[pick])
            drawn.append(float(list_recall(again, TOP_K, bands, rows)))
        error = (estimate - float(list_recall_bound(hist, TOP_K, bands, rows))) / LIST_BOUND_Z
        assert error > 0
        assert error == pytest.approx(np.std(drawn), rel=0.2)


def test_plans_on_lists_meet_the_target_by_the_bound_and_the_cheapest_is_chosen(hist):
    # Every plan with fewer expected candidates than the chosen one has a bound under the
    # target, though some of them have an estimate over it: the margin costs candidates.
    judged = data_plans(THRESHOLD, hist, (128,), 1e-9, TOP_K)
    chosen = data_plans(THRESHOLD, hist, (128,), 0.95, TOP_K)[0]
    assert chosen.list_recall_low >= 0.95 and chosen.expected_list_recall > chosen.list_recall_low
    cheaper = [p for p in judged if p.expected_candidates < chosen.expected_candidates]
    assert cheaper and all(p.list_recall_low < 0.95 for p in cheaper)
    assert any(p.expected_list_recall >= 0.95 for p in cheaper)


def test_a_target_the_estimate_reaches_but_its_bound_does_not_is_refused_with_both(hist):
    # With k=4 the best plan (4 bands of 1 row) has an estimate above the bound; a target
    # between the two is refused, and the message gives the estimate and the bound.
    (best,) = [p for p in data_plans(THRESHOLD, hist, (4,), 1e-9, TOP_K) if (p.bands, p.rows) == (4, 1)]
    target = round((best.expected_list_recall + best.list_recall_low) / 2, 6)
    assert best.list_recall_low < target < best.expected_list_recall
    with pytest.raises(ParameterError, match=rf"nearest is k=4, b=4, r=1 with expected recall of the top-{TOP_K} "
                       rf"lists {best.expected_list_recall:.4f} \(lower bound {best.list_recall_low:.4f}\)"):
        data_plans(THRESHOLD, hist, (4,), target, TOP_K)


def test_a_run_planned_on_lists_finds_its_predicted_share_of_the_true_lists(loans, tmp_path):
    # Oracle: brute force with Python sets of every patron's true top-k (ties at the k-th value
    # honoured: a published neighbour at or above it counts), against the run's index.
    path, events = loans
    manifest = run_job(path, SPEC, RunOptions(threshold=THRESHOLD, top_k=TOP_K, sample_size=SAMPLE,
                                                 recall_of="lists"), tmp_path / "i")
    predicted = manifest["plan"]["predicted"]["expected_list_recall"]
    assert "top-k lists" in manifest["plan"]["why"] and predicted >= 0.95
    sets = python_sets(events)
    got = pl.read_parquet(tmp_path / "i" / "neighbours.parquet").group_by("entity").agg("neighbour")
    published = dict(got.iter_rows())
    hits = places = 0
    for a, v in zip(sorted(sets), true_lists(events, sorted(sets), TOP_K)):
        if len(v):
            kth = v[-1]
            hits += min(len(v), sum(len(sets[a] & sets[b]) / len(sets[a] | sets[b]) >= kth
                                    for b in published.get(a, [])))
            places += len(v)
    assert hits / places >= predicted - 0.02  # the sample's own spread


def test_plan_command_chooses_on_lists_as_the_run_does(loans, hist):
    # Oracle: the planner's own ranking on the same sample (seed 0, as lshjob plan and run draw),
    # and the text table shows the lists' column only when planning on them.
    args = ["plan", "--threshold", str(THRESHOLD), "--sample", str(loans[0]), "--entity", "patron",
            "--element", "title", "--sample-size", str(SAMPLE), "--top-k", str(TOP_K)]
    runner = CliRunner()
    done = runner.invoke(app, [*args, "--recall-of", "lists", "--json"])
    assert done.exit_code == 0, done.output
    chosen = json.loads(done.stdout)["chosen"]
    best = data_plans(THRESHOLD, hist, recall=0.95, top_k=TOP_K)[0]
    assert (chosen["perms"], chosen["bands"], chosen["rows"]) == (best.perms, best.bands, best.rows)
    assert chosen["expected_list_recall"] == pytest.approx(best.expected_list_recall)
    assert " lists " in runner.invoke(app, [*args, "--recall-of", "lists"]).stdout
    assert " lists " not in runner.invoke(app, args).stdout  # the default: pairs
    assert " lists " not in runner.invoke(app, [*args, "--recall-of", "pairs"]).stdout
    bad = runner.invoke(app, [*args, "--recall-of", "entities"])
    assert bad.exit_code == 2 and "--recall-of must be one of lists, pairs; got 'entities'" in bad.output
