"""One plan for lshjob plan and lshjob run: the same sample, seed and sample size give the
same (k, b, r), and the plan the manifest stores reads back unchanged."""

import json

import pytest
from helpers import planted_pairs
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.ingest.loading import load_membership
from lshjob.ingest.spec import EventSpec
from lshjob.plan.banding import DEFAULT_PERMS_CHOICES, data_plans
from lshjob.plan.choose import Plan, PlanMode, choose_plan
from lshjob.plan.similarity import sample_histogram_from_sets

SPEC = ["--entity", "patron", "--element", "title"]


@pytest.fixture(scope="module")
def loans(tmp_path_factory):
    path = tmp_path_factory.mktemp("plan") / "loans.parquet"
    planted_pairs(60, 0.4, seed=21, background=500).write_parquet(path)
    return path


def invoke(*args) -> dict:
    result = CliRunner().invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


@pytest.mark.parametrize("threshold, sample_size", [(0.5, 200), (0.7, 5000)])
def test_plan_and_run_choose_the_same_banding(tmp_path, loans, threshold, sample_size):
    # Oracle: the search (data_plans) called directly on the histogram of the same sample
    # (seed 0, the run's sampling seed), k among 32, 64, 128 and 256.
    sets = load_membership(loans, EventSpec(entity="patron", element="title"))[0]
    hist = sample_histogram_from_sets(sets, sample_size, seed=0, threshold=threshold)
    best = data_plans(threshold, hist, DEFAULT_PERMS_CHOICES, 0.95)[0]
    expected = (best.perms, best.bands, best.rows)

    planned = invoke("plan", "--threshold", threshold, "--sample", loans, *SPEC, "--sample-size", sample_size,
                     "--seed", 0, "--json")
    manifest = invoke("run", loans, *SPEC, "--threshold", threshold, "--sample-size", sample_size,
                      "--out", tmp_path / "idx", "--json", "--quiet")
    run_plan = manifest["plan"]
    assert (planned["perms"], planned["bands"], planned["rows"]) == expected
    assert (run_plan["perms"], run_plan["bands"], run_plan["rows"]) == expected
    assert planned["mode"] == run_plan["mode"] == "data"
    assert run_plan["predicted"]["expected_candidates"] == pytest.approx(best.expected_candidates, rel=1e-12)
    assert planned["chosen"] == run_plan["predicted"]
    # The plan the manifest stores reads back as the same plan.
    assert Plan.from_manifest(manifest).to_dict() == run_plan


def test_plan_and_run_judge_a_given_banding_alike(tmp_path, loans):
    # Oracle: the search at k=64 with a recall target every plan reaches, the entry for
    # (b, r) = (16, 4) read off directly.
    sets = load_membership(loans, EventSpec(entity="patron", element="title"))[0]
    hist = sample_histogram_from_sets(sets, 2000, seed=0, threshold=0.5)
    [judged] = [p for p in data_plans(0.5, hist, (64,), 1e-12) if (p.bands, p.rows) == (16, 4)]
    given = ["--perms", 64, "--bands", 16, "--rows", 4]
    planned = invoke("plan", "--threshold", 0.5, "--sample", loans, *SPEC, *given, "--json")
    manifest = invoke("run", loans, *SPEC, "--threshold", 0.5, *given, "--out", tmp_path / "idx", "--json", "--quiet")
    assert planned["mode"] == manifest["plan"]["mode"] == "explicit"
    for figures in (planned["chosen"], manifest["plan"]["predicted"]):
        assert (figures["perms"], figures["bands"], figures["rows"]) == (64, 16, 4)
        assert figures["expected_recall"] == pytest.approx(judged.expected_recall, rel=1e-12)
        assert figures["meets_target"] is (judged.expected_recall >= 0.95)


def test_threshold_one_is_the_same_plan_in_both(tmp_path, loans):
    # Oracle: Jaccard 1 means equal sets (definition), which the run groups without bands.
    planned = invoke("plan", "--threshold", 1, "--json")
    manifest = invoke("run", loans, *SPEC, "--threshold", 1, "--out", tmp_path / "idx", "--json", "--quiet")
    assert planned["chosen"]["why"] == manifest["plan"]["why"] == choose_plan(1.0).why
    assert manifest["plan"] == {"mode": "identical-only", "why": choose_plan(1.0).why}
    assert (planned["perms"], planned["bands"], planned["rows"]) == (None, None, None)


def test_one_set_kind_plans_no_bands_and_reads_back():
    # Oracle: with fewer than two different sets no pair of different sets exists (definition).
    plan = choose_plan(0.5, distinct_sets=1, seed=1, scheme="kperm")
    assert plan.mode == PlanMode.IDENTICAL and not plan.banded and plan.bands is None
    assert Plan.from_dict(plan.to_dict(), 0.5, 1, "kperm") == plan


def test_theory_plan_matches_the_published_s_curve():
    # Mining of Massive Datasets (Leskovec, Rajaraman, Ullman), section 3.4: for b=20, r=5,
    # P(0.5) = 1 - (1 - 0.5^5)^20 = 0.470 (value from memory, as in test_planner).
    plan = choose_plan(0.5, perms=128, bands=20, rows=5)
    assert plan.mode == PlanMode.EXPLICIT and (plan.perms, plan.bands, plan.rows) == (128, 20, 5)
    assert round(plan.predicted["probability_at_threshold"], 3) == 0.470


def test_plan_and_run_refuse_the_same_plan_over_max_candidates(tmp_path, loans):
    # Oracle: the search called directly; its chosen plan's expected candidates exceed the limit.
    sets = load_membership(loans, EventSpec(entity="patron", element="title"))[0]
    best = data_plans(0.3, sample_histogram_from_sets(sets, 2000, seed=0, threshold=0.3), DEFAULT_PERMS_CHOICES)[0]
    limit = best.expected_candidates / 2
    runner = CliRunner()
    planned = runner.invoke(app, ["plan", "--threshold", "0.3", "--sample", str(loans), *SPEC,
                                  "--max-candidates", str(limit)])
    ran = runner.invoke(app, ["run", str(loans), *SPEC, "--threshold", "0.3", "--max-candidates", str(limit),
                              "--out", str(tmp_path / "idx")])
    assert planned.exit_code == ran.exit_code == 2
    expected = f"the plan (k={best.perms}, b={best.bands}, r={best.rows}) predicts {best.expected_candidates:.3g}"
    assert expected in planned.stderr and planned.stderr == ran.stderr
