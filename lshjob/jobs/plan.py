"""File-level Python API of ``lshjob plan``: choose (k, b, r) in theory mode or from a sample
of events or signatures. Re-exported by :mod:`lshjob.jobs.sign`."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.errors import InputError, ParameterError
from lshjob.index.join.base import JoinSettings
from lshjob.ingest.loading import load_membership
from lshjob.ingest.spec import EventSpec, load_sets
from lshjob.jobs.options import check_options, default_of
from lshjob.plan import banding as planner
from lshjob.plan import similarity
from lshjob.plan.choose import Plan, choose_plan
from lshjob.plan.cost import CostModel, Workload, count_factors, load_model
from lshjob.plan.forecast import forecast, forecast_curve
from lshjob.plan.peak_memory import scale_memory
from lshjob.plan.scaling import (
    ROWS_PER_BAND_JOIN,
    Projection,
    project_counts,
    sample_runs,
    scale_seconds,
)
from lshjob.runtime.budget import default_memory
from lshjob.sign.signatures import params_from_metadata, read_signatures


def plan_banding(
    threshold: float,
    perms: int | None = default_of("perms"),
    recall: float = default_of("recall"),
    sample: str | Path | None = None,
    spec: EventSpec | None = None,
    sample_size: int = default_of("sample_size"),
    entities: int | None = None,
    fp_weight: float = 0.5,
    fn_weight: float = 0.5,
    seed: int = 0,
    runners_up: int = 5,
    bands: int | None = default_of("bands"),
    rows: int | None = default_of("rows"),
    max_candidates: float | None = None,
    plan_by: str = "candidates",
    scheme: str = default_of("scheme"),
    events: int | None = None,
    top_k: int = default_of("top_k"),
    model: CostModel | None = None,
    recall_of: str = default_of("recall_of"),
    shape: dict | None = None,
    history: list | None = None,
) -> Plan:
    """Choose (k, b, r) with :func:`lshjob.plan.choose.choose_plan`, as ``lshjob run`` does.
    Without ``sample``: theory mode (weighted FP/FN areas, k default 128). With ``sample`` (a
    signature file, or events read with ``spec``): data mode, the plan that meets ``recall``
    with the fewest expected candidate pairs, scaled to ``entities`` (default: the entity count
    of the sample file). With ``bands`` and ``rows`` that plan is judged instead of chosen; the
    runners-up are then the recommended plans. ``seed`` draws the sample (the run draws with 0).
    A plan predicting more than ``max_candidates`` candidate pairs is refused, as by the run.

    ``plan_by="cost"``: the plan meeting ``recall`` with the least total seconds predicted by
    ``model`` (default: :func:`lshjob.plan.cost.load_model`) for ``entities`` sets and
    ``events`` events (default: scaled from the sample) signed with ``scheme``. ``shape``, when
    given, receives what the sample held (entities, events, membership rows, dense keys): what
    :func:`forecast_plan` scales from. ``history``: manifests of real runs that correct the
    predicted pairs in the costs (``model`` is refined by them already, when given)."""
    check_options({"threshold": threshold, "perms": perms, "recall": recall, "sample_size": sample_size,
                   "bands": bands, "rows": rows, "recall_of": recall_of})
    if max_candidates is not None:
        check_options({"max_candidates": max_candidates})
    if entities is not None and entities < 2:
        raise ParameterError(f"--entities must be at least 2; got {entities}")
    if plan_by == "cost" and sample is None:
        raise ParameterError("--plan-by cost needs a sample (--sample): the predicted candidates come from it")
    shape = shape if shape is not None else {}
    if threshold == 1.0:  # identical sets only, grouped exactly: the sample is not needed
        plan = choose_plan(threshold)
        return replace(plan, why=plan.why + "; the sample is not read") if sample is not None else plan
    planner.validate(threshold, perms, fp_weight, fn_weight)
    if (bands is None) != (rows is None):
        raise ParameterError("--bands and --rows go together; give both or neither")
    hist, meta = None, {}
    if sample is not None and _is_signature_file(sample):
        table, meta = read_signatures(sample)
        if table.height < 2:
            raise InputError(f"{sample}: the sample needs at least 2 signature rows; got {table.height}")
        if perms is not None and perms > meta["k"]:
            raise ParameterError(f"--perms {perms} exceeds the signature length k={meta['k']} of {sample}")
        hist = similarity.sample_histogram_from_signatures(
            table, params_from_metadata(meta), sample_size, seed, entities, threshold
        )
        sizes = table["set_size"].cast(pl.Float64).sum() if "set_size" in table.columns else table.height
        shape.update(entities=table.height, events=sizes, membership_rows=sizes, dense_keys=False)
    elif sample is not None:
        if spec is None:
            raise ParameterError(
                f"{sample}: is not a signature file; to plan from events give --entity and --element"
            )
        if spec.key_columns == ["entity"]:  # the streaming loader: 8-20 bytes an event, not ~100
            sets, report = load_membership(sample, spec)
            n_entities = sets.size
        else:
            sets, report = load_sets(sample, spec)[:2]
            n_entities = sets["entity"].n_unique()
        shape.update(entities=n_entities, events=report.rows_read, membership_rows=report.membership_rows or
                     report.rows_read, dense_keys=report.entity_range is not None)
        if isinstance(sets, ElementSets):  # a forecast scaled from runs of this sample profiles it
            shape["sets"] = sets
        if n_entities < 2:
            raise InputError(f"{sample}: the sample needs at least 2 entities; got {n_entities}")
        hist = similarity.sample_histogram_from_sets(sets, sample_size, seed, entities, threshold)
    scheme = meta.get("scheme", scheme)
    costing = None
    if plan_by == "cost" and hist is not None:
        model = model or load_model().refine(history or [])
        pairs = count_factors(history or [])
        if not history and shape.get("sets") is not None:  # as lshjob run --plan-by cost costs its plans
            from lshjob.index.collapse import collapse_identical

            pairs["representative_share"] = len(collapse_identical(shape["sets"])[1]) / max(shape["sets"].size, 1)
        costing = lambda figures: model.stage_seconds(_workload(figures, shape, entities, events, scheme,
                                                                top_k, pairs))["total"]
    return choose_plan(threshold, hist, perms=perms, bands=bands, rows=rows, recall=recall, fp_weight=fp_weight,
                       fn_weight=fn_weight, max_candidates=max_candidates, runners_up=runners_up,
                       signature_perms=meta.get("k"),
                       seed=meta.get("seed"), scheme=scheme, plan_by=plan_by, costing=costing,
                       crowd_size=JoinSettings.crowd_size, top_k=top_k if recall_of == "lists" else None)


def _workload(figures: dict, shape: dict, entities: int | None, events: int | None, scheme: str,
              top_k: int, pairs: dict[str, float] | None = None) -> Workload:
    """The counts of a run at ``entities`` sets (default: the sample's) and ``events`` events
    (default: the sample's events per set times the sets) under the plan of ``figures``, its
    predicted pairs times ``pairs`` (:func:`lshjob.plan.cost.count_factors`) when given."""
    if pairs:
        figures = dict(figures, expected_candidates=figures.get("expected_candidates", 0) * pairs["candidate_pairs"],
                       expected_verified=figures.get("expected_verified", 0) * pairs["verified_pairs"])
    n = entities or shape["entities"]
    per_set = shape["events"] / max(shape["entities"], 1)
    e = events if events is not None else per_set * n
    return Workload.predicted(figures, n, e, membership_share=shape["membership_rows"] / max(shape["events"], 1),
                              representative_share=(pairs or {}).get("representative_share", 1.0),
                              scheme=scheme or "kperm", top_k=top_k)


def forecast_plan(plan: Plan, shape: dict, entities: int | None = None, events: int | None = None,
                  memory: int | None = None, parts: int | None = None, top_k: int = default_of("top_k"),
                  model: CostModel | None = None, history: list | None = None,
                  max_candidates: float | None = None, curve: bool = False, refined: bool = False) -> dict:
    """The forecast of ``lshjob plan`` (:func:`lshjob.plan.forecast.forecast`) for the chosen
    plan, each runner-up's predicted seconds, and warnings (above ``--max-candidates``, or the
    run's default bound, at this size). ``history``: manifests of real runs that refine the
    model (:meth:`lshjob.plan.cost.CostModel.refine`; ``refined``: ``model`` already is) and
    correct the predicted pairs. Theory and identical-only plans have no predicted candidates:
    their forecast says so."""
    if not plan.banded or plan.histogram is None or not shape:
        return {"available": False, "why": "a forecast needs predicted candidates: plan from a sample (--sample)"}
    model = model or load_model()
    if history and not refined:
        model.refine(history)
    pairs = count_factors(history or [])
    scheme = plan.scheme or "kperm"
    load = _workload(plan.predicted, shape, entities, events, scheme, top_k, pairs)
    samples = sample_runs(history or [], load.entities)
    scaled_from = None
    if samples and shape.get("sets") is not None:  # runs of the sample: scale them (lshjob.plan.scaling)
        scaled_from = _projection(plan, shape, samples, load, scheme, top_k)
        load = scaled_from.workload
    seconds = by_stage = None
    if scaled_from is not None:
        facts = scaled_from.facts  # a join grouping the sample's pairs, writing a row per band at full size
        join_factor = ROWS_PER_BAND_JOIN if facts["rows_per_band"] and not facts["sample_rows_per_band"] else 1.0
        counted = scaled_from.runs or [r.workload for r in samples]  # with their crowds' share
        seconds, fixed = scale_seconds(model, [(w, r.seconds) for w, r in zip(counted, samples, strict=True)], load,
                                       scaled_from.visits, join_factor)
        by_stage = scale_memory(model, [(r.workload, r.peaks, r.memory) for r in samples], load,
                                memory or default_memory())
    out = forecast(model, load, memory, parts, shape.get("dense_keys", True), seconds, by_stage)
    out["available"] = True
    out["method"] = "cost model"
    if scaled_from is not None:
        out["method"] = f"scaled from {len(samples)} run(s) of the sample"
        out["scaling"] = {**scaled_from.facts, "fixed_seconds": fixed,
                          "sample_runs": [int(r.workload.entities) for r in samples]}
        if all(r.cpu for r in samples):  # CPU time: what the machine's load changes least
            cpu = scale_seconds(model, [(w, r.cpu) for w, r in zip(counted, samples, strict=True)], load,
                                scaled_from.visits, join_factor)[0]
            out["cpu_seconds"] = {k: round(v, 3) for k, v in cpu.items()}
    out["pair_corrections"] = pairs  # measured / predicted pairs of the --history runs, their representatives' share
    out["runners_up"] = [
        {"perms": r["perms"], "bands": r["bands"], "rows": r["rows"],
         "expected_candidates": r.get("expected_candidates"), "expected_recall": r.get("expected_recall"),
         "seconds": round(model.stage_seconds(_workload(r, shape, entities, events, scheme, top_k, pairs))["total"],
                          3)}
        for r in plan.runners_up if "expected_candidates" in r]
    bound = max_candidates if max_candidates is not None else default_of("max_candidates")
    expected = plan.predicted.get("expected_candidates", 0)
    crowded = planner.crowd_split(plan.histogram, plan.bands, plan.rows, JoinSettings.crowd_size)
    written = plan.predicted.get("expected_written_pairs")
    if written is None:  # as the run counts them: the pairs outside crowds, which the join writes
        written = expected if crowded is None else expected * (1.0 - crowded)
    out["warnings"] = ([f"the plan predicts {expected:.3g} candidate pairs at {int(load.entities)} entities "
                        f"({written:.3g} outside crowds, written by the join), more than --max-candidates "
                        f"{bound:.3g}: lshjob run would refuse it; raise the threshold or --max-candidates"]
                       if written > bound else [])
    if scaled_from is None and (crowded or 0.0) >= CROWDED_FORECAST:
        out["warnings"].append(
            f"{crowded:.0%} of the predicted candidate pairs fall in crowds (buckets of "
            f"{JoinSettings.crowd_size} members or more), which verification pairs up itself with the "
            "top-k lists' floors: the cost model counts them as written and verified pairs, so its join, "
            "verify and publish seconds are upper bounds, far above the run on such data; give --history "
            "the indexes of runs of a uniform sample of the entities to forecast from them instead")
    if curve:  # the plan's page: the same shape at a tenth to a hundred times the size
        out["curve"] = forecast_curve(model, load, [load.entities * f for f in CURVE_FACTORS], memory, top_k)
    return out


def _projection(plan: Plan, shape: dict, samples: list, load: Workload, scheme: str, top_k: int) -> Projection:
    """The full run's counts projected from the sample's profile under ``plan`` and the
    largest run of the sample (:func:`lshjob.plan.scaling.project_counts`)."""
    from lshjob.jobs.sample_profile import sample_profile

    profile = sample_profile(shape["sets"], plan.perms, plan.bands, plan.rows, scheme, plan.seed, plan.threshold)
    figures = dict(plan.predicted or {}, perms=plan.perms, bands=plan.bands)
    projected = project_counts(profile, samples, figures, load.entities, load.events,
                               load.membership_rows / max(load.events, 1), scheme, top_k, JoinSettings.max_bucket,
                               JoinSettings.dedupe_up_to, JoinSettings.max_repeat, JoinSettings.crowd_size,
                               JoinSettings().crowd_cap())
    projected.visits = profile.visits_at
    return projected


# the share of candidate pairs in crowds from which the cost model's forecast is called an upper bound
CROWDED_FORECAST = 0.5
CURVE_FACTORS = (0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0)  # the plan page's curve: multiples of the forecast's size


def plan_summary(plan: Plan, sample: str | Path | None = None) -> dict:
    """What ``lshjob plan`` prints: the chosen plan's figures, the runners-up and (data mode)
    what the sample ``sample`` held."""
    info = None
    hist = plan.histogram
    if hist is not None:
        info = {
            "path": str(sample),
            "similarity": hist.basis,
            "sampled_entities": hist.sample_entities,
            # past the planner's visit budget, fewer are visited and their pairs weighted
            "visited_entities": hist.sample_entities if hist.visited_entities is None else hist.visited_entities,
            "total_entities": hist.total_entities,
            "design": hist.design,
            "sampled_pairs": int(hist.counts.sum() + hist.identical_pairs),
            "sampled_identical_pairs": int(hist.identical_pairs),
            "expected_identical_pairs": hist.identical_pairs * hist.scale,
            "sampled_pairs_at_or_above_threshold": int(hist.pairs_at_or_above(plan.threshold)),
            "recall_target": plan.recall,
        }
    return {
        "mode": str(plan.mode),
        "threshold": plan.threshold,
        "perms": plan.perms,
        "bands": plan.bands,
        "rows": plan.rows,
        "chosen": plan.predicted if plan.banded else {"why": plan.why},
        "runners_up": list(plan.runners_up),
        "sample": info,
    }


def _is_signature_file(path: str | Path) -> bool:
    path = Path(path)
    if not path.is_file() or path.suffix.lower() not in (".parquet", ".pq"):
        return False
    try:
        return "lshjob" in pl.read_parquet_metadata(path)
    except Exception:
        return False
