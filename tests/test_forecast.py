"""The cost model and the forecast: the fit recovers known coefficients, a machine without a
calibration says it uses the shipped default, lshjob plan prints the forecast, plan-by-cost
chooses the least predicted seconds, and the forecast ranks plans as measured runs do."""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.demo.generate import generate_events
from lshjob.index.join.base import JoinSettings
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.calibrate import calibration_events, refine_sources
from lshjob.jobs.plan import forecast_plan, plan_banding
from lshjob.jobs.run import RunOptions, run_job
from lshjob.plan import cost
from lshjob.plan.cost import CostModel, Workload, fit_stage, load_model, shipped_model
from lshjob.plan.forecast import forecast

runner = CliRunner()


@pytest.fixture(autouse=True)
def own_cache(tmp_path, monkeypatch):
    """No calibration of the user running the tests is read: a cache folder of the test's own."""
    monkeypatch.delenv(cost.MODEL_ENV, raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))


@pytest.fixture(scope="module")
def loans(tmp_path_factory):
    folder = tmp_path_factory.mktemp("forecast")
    events, _ = generate_events(300, seed=5)
    events.write_parquet(folder / "loans.parquet")
    return folder / "loans.parquet"


def _load(i: int, rng) -> Workload:
    return Workload(events=float(rng.integers(1e4, 1e7)), entities=1e4 * (i + 1), membership_rows=float(
        rng.integers(1e4, 1e7)), representatives=1e4 * (i + 1), perms=int(rng.choice([64, 128, 256])),
        bands=int(rng.integers(8, 64)), scheme="kperm", candidate_pairs=float(rng.integers(0, 1e7)),
        verified_pairs=float(rng.integers(0, 1e5)), published_rows=float(rng.integers(0, 1e5)))


def test_fit_recovers_known_coefficients_and_keeps_them_non_negative():
    # Oracle: algebra. Seconds made exactly from known coefficients are fitted back; a term
    # whose true effect is negative gets 0, not a negative coefficient.
    rng = np.random.default_rng(3)
    loads = [_load(i, rng) for i in range(12)]
    truth = [0.2 + 3e-8 * w.bucket_rows + 4e-7 * w.candidate_pairs for w in loads]
    fit = fit_stage(("bucket_rows", "candidate_pairs"), loads, truth)
    assert fit.constant == pytest.approx(0.2, rel=1e-6)
    assert fit.coefficients == pytest.approx((3e-8, 4e-7), rel=1e-6)
    falling = [5.0 - 1e-7 * w.candidate_pairs + 1e-8 * w.bucket_rows for w in loads]
    fit = fit_stage(("bucket_rows", "candidate_pairs"), loads, falling)
    assert min(fit.coefficients) >= 0 and fit.constant >= 0


def test_refining_from_a_real_run_scales_the_variable_part():
    # Oracle: algebra. A manifest measuring exactly twice the model's variable part of a stage
    # makes that stage's forecast constant + 2 x variable; other stages unchanged.
    model = shipped_model()
    w = Workload(**model.points[-1]["workload"])
    before = model.stage_seconds(w)
    fit = model.seconds["sign"]
    manifest = {"counts": {"events": w.events, "entities": w.entities, "membership_rows": w.membership_rows,
                           "representatives": w.representatives, "candidate_pairs": w.candidate_pairs,
                           "verified_pairs": w.verified_pairs, "published_rows": w.published_rows},
                "plan": {"perms": w.perms, "bands": w.bands}, "options": {"scheme": w.scheme},
                "seconds": {"sign": fit.constant + 2 * fit.variable(w), "total": 1.0}, "peak_memory_bytes": {}}
    model.refine([("run", manifest)])
    after = model.stage_seconds(w)
    assert after["sign"] == pytest.approx(fit.constant + 2 * fit.variable(w), rel=1e-9)
    assert after["join"] == pytest.approx(before["join"], rel=1e-12)


def test_a_machine_never_calibrated_uses_the_shipped_default_and_says_so(tmp_path):
    model = load_model()
    assert model.source == "shipped default" and "shipped default" in model.provenance
    assert cost.model_path() == tmp_path / "cache" / "lshjob" / "cost-model.json"  # XDG cache folder
    (tmp_path / "cache" / "lshjob").mkdir(parents=True)
    cost.model_path().write_text("{not json")
    assert load_model().source == "shipped default"  # an unreadable file counts as none


def test_plan_json_holds_the_forecast_and_the_text_a_table(loans):
    args = ["plan", "--threshold", "0.5", "--sample", str(loans), "--entity", "patron", "--element", "title",
            "--entities", "3000", "--events", "60000"]
    out = runner.invoke(app, [*args, "--json"])
    assert out.exit_code == 0, out.output
    fc = json.loads(out.output)["forecast"]
    assert fc["available"] and set(fc["seconds"]) == set(cost.STAGES) | {"total"}
    # Oracle: arithmetic. The total is the stages plus the model's remainder; the peak the largest stage.
    assert fc["seconds"]["total"] >= sum(v for k, v in fc["seconds"].items() if k != "total") - 0.01
    assert fc["peak_memory_bytes"] == max(fc["peak_memory_by_stage"].values())
    assert fc["counts"]["entities"] == 3000 and fc["counts"]["events"] == 60000
    assert fc["coefficients"]["source"] == "shipped default" and fc["in_parts"] is False
    assert fc["disk_bytes"]["total"] == fc["disk_bytes"]["work"] + fc["disk_bytes"]["output"]
    text = runner.invoke(app, args)
    assert "forecast at 3,000 entities" in text.output and "shipped default" in text.output
    big = args[:-4] + ["--entities", "3000000", "--events", "60000000", "--memory", "512MiB", "--json"]
    assert json.loads(runner.invoke(app, big).output)["forecast"]["in_parts"] is True  # the run's own rule


def test_theory_mode_has_no_forecast_and_bad_plan_by_is_refused():
    out = runner.invoke(app, ["plan", "--threshold", "0.5", "--json"])
    assert json.loads(out.output)["forecast"]["available"] is False
    bad = runner.invoke(app, ["plan", "--threshold", "0.5", "--plan-by", "speed"])
    assert bad.exit_code == 2 and "--plan-by must be one of candidates, cost" in bad.output


def test_plan_by_cost_chooses_the_least_predicted_seconds(loans):
    # Oracle: brute force over every plan meeting the target, each costed by the same model.
    spec = EventSpec(entity="patron", element="title")
    shape: dict = {}
    plan = plan_banding(0.5, sample=loans, spec=spec, entities=5000, plan_by="cost", shape=shape, runners_up=60)
    assert plan.predicted["predicted_seconds"] <= min(r["predicted_seconds"] for r in plan.runners_up)
    assert "least predicted seconds" in plan.why
    by_candidates = plan_banding(0.5, sample=loans, spec=spec, entities=5000)
    assert by_candidates.predicted["expected_candidates"] <= plan.predicted["expected_candidates"] + 1e-6
    assert plan.predicted["expected_recall"] >= 0.95


def test_a_plan_over_max_candidates_at_the_forecast_size_is_warned_of(loans):
    spec = EventSpec(entity="patron", element="title")
    shape: dict = {}
    plan = plan_banding(0.5, sample=loans, spec=spec, entities=10_000_000, shape=shape)
    fc = forecast_plan(plan, shape, 10_000_000, max_candidates=1e6)
    assert any("more than --max-candidates" in w for w in fc["warnings"])


def test_a_forecast_whose_pairs_fall_in_crowds_calls_the_cost_model_an_upper_bound(tmp_path, loans):
    # Oracle: crowd_split, the crowds' share of the plan's pairs (checked against bucket sizes
    # from Python sets in tests/test_plan_crowds.py). Long-tailed patrons forecast at 10M put
    # most of their predicted pairs in crowds, and the warning says so with that share; the flat
    # library loans put none there, and have no such warning.
    from test_plan_crowds import long_tailed

    from lshjob.plan.banding import crowd_split

    spec = EventSpec(entity="patron", element="title")
    path = tmp_path / "tail.parquet"
    long_tailed(3000, median=3.0, exponent=1.6).write_parquet(path)
    for sample, size, crowded in ((path, 10_000_000, True), (loans, 5000, False)):
        shape: dict = {}
        plan = plan_banding(0.5, sample=sample, spec=spec, entities=size, shape=shape, sample_size=300)
        share = crowd_split(plan.histogram, plan.bands, plan.rows, JoinSettings.crowd_size) or 0.0
        said = [w for w in forecast_plan(plan, shape, size)["warnings"] if "fall in crowds" in w]
        assert (share >= 0.5) is crowded
        assert len(said) == crowded and all(w.startswith(f"{share:.0%} of the predicted") for w in said)


def test_forecast_ranks_plans_as_measured_runs_do(tmp_path):
    # Oracle: measured wall seconds of whole runs (the manifests), outside the model. Plans of
    # very different cost on the same 3,000 sets (a few titles: a plan of one-row bands makes
    # a million candidate pairs, one of 8-row bands almost none); the shipped default forecast,
    # refined by nothing, must order them as the measured totals do. The gap (2-4x measured
    # here on a busy machine) is kept wide so that timing noise cannot swap them.
    events = tmp_path / "events.parquet"
    calibration_events(3000, 7, 1500).write_parquet(events)
    spec = EventSpec(entity="entity", element="element")
    run_job(events, spec, RunOptions(threshold=0.5, perms=64, bands=8, rows=8), tmp_path / "warm")
    model = shipped_model()
    measured, predicted = [], []
    for i, (k, b, r) in enumerate([(64, 64, 1), (64, 8, 8)]):
        m = run_job(events, spec, RunOptions(threshold=0.5, perms=k, bands=b, rows=r), tmp_path / f"run-{i}")
        measured.append(m["seconds"]["total"])
        predicted.append(forecast(model, Workload.from_manifest(m))["seconds"]["total"])
    assert list(np.argsort(measured)) == list(np.argsort(predicted)) == [1, 0], (measured, predicted)


def test_history_reads_index_folders_and_refuses_anything_else(tmp_path):
    folder = tmp_path / "idx"
    folder.mkdir()
    (folder / "manifest.json").write_text(json.dumps({"counts": {}, "seconds": {"total": 1}}))
    assert refine_sources([folder])[0][0] == str(folder / "manifest.json")
    out = runner.invoke(app, ["plan", "--threshold", "0.5", "--history", str(tmp_path / "none")])
    assert out.exit_code == 2 and "neither an index folder" in out.output


def test_calibration_model_is_what_the_forecast_reads(tmp_path, monkeypatch):
    points = shipped_model().points
    model = CostModel(points, "calibrated", "test", None)
    path = cost.model_path()
    path.parent.mkdir(parents=True)
    path.write_text(json.dumps(model.to_json()))
    loaded = load_model()
    assert loaded.source == "calibrated" and loaded.path == str(path)
    w = Workload(**points[0]["workload"])
    assert loaded.stage_seconds(w) == model.stage_seconds(w)


def test_calibrate_writes_the_model_the_forecast_then_reads(tmp_path, monkeypatch):
    # Three tiny measured runs (the real calibration's are larger): the model file is written
    # whole at the cache path, holds one point a run, and the forecast then says "calibrated".
    from lshjob.jobs.calibrate import calibrate

    summary = calibrate(None, runs=((3000, 64, "kperm", None), (4000, 128, "kperm", None), (5000, 64, "oph", None)))
    path = cost.model_path()
    assert summary["path"] == str(path) and [p.name for p in path.parent.iterdir()] == ["cost-model.json"]
    record = json.loads(path.read_text())
    # Oracle: the runs asked for, as the model file records them (entities, k, scheme of each point).
    assert [(p["workload"]["entities"], p["workload"]["perms"], p["workload"]["scheme"]) for p in record["points"]] \
        == [(3000, 64, "kperm"), (4000, 128, "kperm"), (5000, 64, "oph")]
    assert load_model().source == "calibrated"
    out = runner.invoke(app, ["calibrate", "--seconds", "0"])
    assert out.exit_code == 2 and "--seconds must be above 0" in out.output


def test_run_plans_by_cost_as_lshjob_plan_does(loans, tmp_path):
    # Oracle: lshjob plan --plan-by cost on the same file (the sample is the whole file), the
    # ranking tested above by brute force; the default run still plans by candidates.
    args = ["--threshold", "0.5", "--entity", "patron", "--element", "title"]
    planned = json.loads(runner.invoke(app, ["plan", *args, "--sample", str(loans), "--plan-by", "cost",
                                             "--json"]).output)
    ran = runner.invoke(app, ["run", str(loans), *args, "--out", str(tmp_path / "idx"), "--plan-by", "cost",
                              "--json", "--quiet"])
    assert ran.exit_code == 0, ran.output
    plan = json.loads(ran.output)["plan"]
    assert (plan["perms"], plan["bands"], plan["rows"]) == (planned["perms"], planned["bands"], planned["rows"])
    assert "least predicted seconds" in plan["why"] and plan["predicted"]["predicted_seconds"] > 0
    default = json.loads(runner.invoke(app, ["run", str(loans), *args, "--out", str(tmp_path / "idx2"), "--json",
                                             "--quiet"]).output)["plan"]
    by_candidates = json.loads(runner.invoke(app, ["plan", *args, "--sample", str(loans), "--json"]).output)
    assert (default["perms"], default["bands"], default["rows"]) == (
        by_candidates["perms"], by_candidates["bands"], by_candidates["rows"])
    assert (plan["perms"], plan["bands"], plan["rows"]) != (default["perms"], default["bands"], default["rows"])
    bad = runner.invoke(app, ["run", str(loans), *args, "--out", str(tmp_path / "idx3"), "--plan-by", "speed"])
    assert bad.exit_code == 2 and "--plan-by must be one of" in bad.output
