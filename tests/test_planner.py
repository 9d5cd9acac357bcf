"""Banding planner: S-curve, FP/FN areas, theory and data modes, against outside references."""

import json
import xml.etree.ElementTree as ET

import numpy as np
import polars as pl
import pytest
from datasketch.lsh import _optimal_param
from scipy.integrate import quad
from typer.testing import CliRunner

from lshjob import ParameterError
from lshjob.cli.app import app
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.sign import plan_banding
from lshjob.plan.banding import (
    PairHistogram,
    approximate_threshold,
    candidate_probability,
    check_explicit,
    data_plans,
    false_negative_area,
    false_positive_area,
    theory_plan,
)
from lshjob.plan.similarity import exact_pair_similarities, histogram


def test_s_curve_matches_published_table():
    # Mining of Massive Datasets (Leskovec, Rajaraman, Ullman), section 3.4, table of
    # 1-(1-s^5)^20 for b=20, r=5 (values from memory, printed to 3 or 4 decimals).
    table = {0.2: 0.006, 0.3: 0.047, 0.4: 0.186, 0.5: 0.470, 0.6: 0.802, 0.7: 0.975}
    for s, published in table.items():
        assert round(float(candidate_probability(s, 20, 5)), 3) == published
    assert round(float(candidate_probability(0.8, 20, 5)), 4) == 0.9996
    # Same section: the threshold of b=20, r=5 is about (1/20)^(1/5) = 0.55.
    assert round(approximate_threshold(20, 5), 2) == 0.55


@pytest.mark.parametrize("t, b, r", [(0.3, 20, 5), (0.5, 25, 5), (0.8, 9, 14), (0.1, 256, 1), (0.95, 1, 256)])
def test_areas_match_scipy_quadrature(t, b, r):
    # Oracle: scipy.integrate.quad (reference library) on the same integrands.
    fp = quad(lambda s: 1 - (1 - s**r) ** b, 0, t, limit=200)[0]
    fn = quad(lambda s: (1 - s**r) ** b, t, 1, limit=200)[0]
    assert false_positive_area(t, b, r) == pytest.approx(fp, abs=1e-10)
    assert false_negative_area(t, b, r) == pytest.approx(fn, abs=1e-10)


def weighted_error_by_quad(t, b, r, wfp, wfn):
    fp = quad(lambda s: 1 - (1 - s**r) ** b, 0, t, limit=200)[0]
    fn = quad(lambda s: (1 - s**r) ** b, t, 1, limit=200)[0]
    return wfp * fp + wfn * fn


@pytest.mark.parametrize("perms", [32, 64, 128, 256])
def test_theory_choice_never_worse_than_datasketch(perms):
    # Oracle: datasketch (reference library) MinHashLSH's parameter search, both choices
    # scored by scipy quad, over thresholds 0.1..0.95 and two weightings.
    for wfp, wfn in ((0.5, 0.5), (0.2, 0.8)):
        for t in np.round(np.arange(0.1, 0.951, 0.05), 2):
            ours = theory_plan(float(t), perms, wfp, wfn)
            theirs = _optimal_param(float(t), perms, wfp, wfn)
            assert ours.bands * ours.rows <= perms
            mine = weighted_error_by_quad(t, ours.bands, ours.rows, wfp, wfn)
            ref = weighted_error_by_quad(t, *theirs, wfp, wfn)
            assert mine <= ref + 1e-9, (t, perms, (ours.bands, ours.rows), theirs)


def test_exact_pair_similarities_match_brute_force():
    # Oracle: Python set intersection over every pair.
    rng = np.random.default_rng(3)
    sets = {f"p{i}": set(rng.integers(0, 40, rng.integers(1, 15)).tolist()) for i in range(60)}
    rows = [(p, e) for p, s in sets.items() for e in s]
    frame = pl.DataFrame(rows, schema={"entity": pl.String, "element": pl.Int64}, orient="row")
    got = exact_pair_similarities(frame)
    names = sorted(sets)
    expected = [
        len(sets[a] & sets[b]) / len(sets[a] | sets[b]) for i, a in enumerate(names) for b in names[i + 1 :]
    ]
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-15)


def test_data_mode_figures_match_direct_sums():
    # Oracle: sum of P(s) over the individual sampled pairs, scaled by N(N-1)/(m(m-1)).
    rng = np.random.default_rng(5)
    sims = np.concatenate([rng.beta(0.5, 8, 20000), rng.uniform(0.5, 1.0, 300), np.ones(7)])
    m = 201  # 201*200/2 = 20100 pairs; the counts above need not match m for this check
    hist = histogram(sims, m, 10_000)
    assert hist.identical_pairs == 7
    plan = data_plans(0.6, hist, (64,), 0.9)[0]
    scale = 10_000 * 9_999 / (m * (m - 1))
    rest = sims[sims < 1]
    p = candidate_probability(rest, plan.bands, plan.rows)
    assert plan.expected_candidates == pytest.approx(p.sum() * scale, rel=2e-3)
    above = rest >= 0.6
    assert plan.expected_recall == pytest.approx(p[above].sum() / above.sum(), rel=2e-3)
    assert plan.expected_recall >= 0.9
    assert plan.bucket_rows == 10_000 * plan.bands


def test_data_mode_prefers_fewer_candidates_among_plans_meeting_recall():
    # Oracle: exhaustive check of every (b, r) for k=64 by direct sums.
    rng = np.random.default_rng(8)
    sims = np.concatenate([rng.beta(0.3, 10, 50000), rng.uniform(0.4, 1.0, 500)])
    hist = histogram(sims, 400, 400)
    best = data_plans(0.5, hist, (64,), 0.95)[0]
    above = sims >= 0.5
    for b in range(1, 65):
        for r in range(1, 64 // b + 1):
            p = candidate_probability(sims, b, r)
            if p[above].mean() >= 0.95 + 1e-3:
                assert best.expected_candidates <= p.sum() * 1.01 + 1e-6


def test_impossible_target_is_refused_with_nearest_plan():
    hist = PairHistogram(np.array([0.05, 0.15, 0.3]), np.array([1000, 100, 50]), 100, 100)
    with pytest.raises(ParameterError, match=r"nearest is k=16, b=16, r=1 .* would reach it"):
        data_plans(0.1, hist, (16,), 0.999)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"threshold": 0.0}, "--threshold must be in"),
        ({"threshold": 1.5}, r"--threshold must be in \(0, 1\]; got 1.5"),
        ({"threshold": 0.5, "perms": 0}, "--perms must be at least 1"),
        ({"threshold": 0.5, "fp_weight": -1}, "must be >= 0"),
        ({"threshold": 0.5, "fp_weight": 0, "fn_weight": 0}, "cannot both be 0"),
    ],
)
def test_bad_planner_options(kwargs, message):
    with pytest.raises(ParameterError, match=message):
        plan_banding(**kwargs)


def test_threshold_one_plans_identical_sets_only_as_the_run_does():
    # Only pairs of identical sets reach Jaccard 1, and the run groups those exactly, so no
    # banding is chosen (the run's plan at threshold 1.0: prepare.choose_plan).
    plan = plan_banding(1.0)
    assert plan.mode == "identical-only" and (plan.perms, plan.bands, plan.rows) == (None, None, None)


def test_explicit_bands_rows_must_fit_the_signature():
    with pytest.raises(ParameterError, match="20 x 7 = 140 > 128"):
        check_explicit(128, 20, 7)


def test_sample_with_one_entity_is_refused(tmp_path):
    path = tmp_path / "one.parquet"
    pl.DataFrame({"patron": ["a", "a"], "title": ["x", "y"]}).write_parquet(path)
    with pytest.raises(Exception, match="at least 2 entities"):
        plan_banding(0.5, sample=path, spec=EventSpec(entity="patron", element="title"))


def test_plan_cli_json_and_svg_chart(tmp_path, demo_events):
    events, _ = demo_events
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    chart = tmp_path / "curve.svg"
    result = CliRunner().invoke(
        app,
        ["plan", "--threshold", "0.6", "--sample", str(src), "--entity", "patron", "--element", "title",
         "--sample-size", "500", "--entities", "2000000", "--chart", str(chart), "--json"],
    )
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert out["mode"] == "data" and out["sample"]["total_entities"] == 2_000_000
    assert out["chosen"]["expected_recall"] >= 0.95
    assert out["bands"] * out["rows"] <= out["perms"]
    root = ET.parse(chart).getroot()
    assert root.tag.endswith("svg") and any(el.get("id") == "s-curve" for el in root.iter())


def test_against_all_sample_estimates_population_pair_counts(tmp_path):
    # Oracle: exact pair counts from scipy sparse products over the whole input.
    import sys

    sys.path.insert(0, str(__import__("pathlib").Path(__file__).parent))
    from helpers import planted_pairs
    from test_run import brute_force_pairs

    from lshjob.core.sets import ElementSets
    from lshjob.plan.similarity import sample_histogram_from_sets

    events = planted_pairs(600, 0.3, seed=12, background=400)
    truth = brute_force_pairs(events, 0.5)
    sets = ElementSets.from_sets(events.rename({"patron": "entity", "title": "element"}).unique())
    n = sets.size
    nearly_all = sample_histogram_from_sets(sets, n - 1, seed=1, threshold=0.5)
    assert nearly_all.design == "against_all"
    # Pairs at exactly J = 0.5 sit on the threshold and must count as at-or-above.
    assert nearly_all.pairs_at_or_above(0.5) * nearly_all.scale == pytest.approx(len(truth), rel=0.01)
    half = sample_histogram_from_sets(sets, n // 2, seed=2, threshold=0.5)
    assert half.pairs_at_or_above(0.5) * half.scale == pytest.approx(len(truth), rel=0.12)


def test_plan_judges_a_given_banding(tmp_path, demo_events):
    runner = CliRunner()
    result = runner.invoke(app, ["plan", "--threshold", "0.5", "--perms", "128", "--bands", "20", "--rows", "5",
                                 "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert (out["bands"], out["rows"]) == (20, 5)
    # Oracle: MMDS 3.4 value quoted above, P(0.5) for b=20, r=5 is 0.470.
    assert round(out["chosen"]["probability_at_threshold"], 3) == 0.470
    result = runner.invoke(app, ["plan", "--threshold", "0.5", "--perms", "128", "--bands", "20", "--rows", "7"])
    assert result.exit_code == 2 and "20 x 7 = 140 > 128" in result.stderr
    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    result = runner.invoke(app, ["plan", "--threshold", "0.5", "--sample", str(src), "--entity", "patron",
                                 "--element", "title", "--perms", "64", "--bands", "2", "--rows", "32", "--json"])
    out = json.loads(result.stdout)
    assert out["chosen"]["meets_target"] is False and out["runners_up"][0]["meets_target"] is True


@pytest.mark.parametrize("share", [0.0, 0.02, 0.5, 1.0])
def test_restricted_index_keeps_exactly_the_wanted_elements(share):
    # Oracle: numpy's isin and searchsorted, set by set. Codes span the whole int64 range
    # (negative, extreme) and repeat across sets; from no element wanted to all of them.
    from lshjob.core.sets import ElementSets
    from lshjob.plan.similarity import restricted_index

    rng = np.random.default_rng(31)
    pool = np.concatenate([rng.integers(-2**63, 2**63 - 1, 3000, dtype=np.int64),
                           np.array([-2**63, 2**63 - 1, 0, -1], dtype=np.int64)])
    sizes = rng.integers(0, 40, 700)
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    elements = rng.choice(pool, offsets[-1])
    sets = ElementSets(pl.Series("entity", np.arange(700)), offsets, elements, None)
    wanted = rng.choice(pool, int(share * len(pool))) if share < 1 else pool

    got_offsets, got_dense, n_ids = restricted_index(sets, wanted)

    uniq = np.unique(wanted)
    assert n_ids == len(uniq)
    for i in range(700):
        mine = elements[offsets[i]:offsets[i + 1]]
        kept = mine[np.isin(mine, uniq)]
        assert got_offsets[i + 1] - got_offsets[i] == len(kept)
        assert got_dense[got_offsets[i]:got_offsets[i + 1]].tolist() == np.searchsorted(uniq, kept).tolist()
