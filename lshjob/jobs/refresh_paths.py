"""The two ways a refresh builds its index from the store's state (for :mod:`lshjob.jobs.refresh`).

* updated: the state of the last index (:mod:`lshjob.jobs.refresh_index`) is updated for the
  entities the batch (or an expired period) touched (:func:`touched_entities`, :func:`build`);
  after it the kept plan is judged on a new sample of the window (:func:`sampled_recall`);
* from nothing: :func:`build` with an empty state and every entity of the window (the first
  refresh, a new plan (:func:`plan_from_window`), or a store whose state was made under another
  plan or by a full run).

Both publish through the run's publish stage (:mod:`lshjob.index.publish`) into ``built``
(:func:`publish_state`).
"""

from __future__ import annotations

import time
from contextlib import contextmanager
from dataclasses import asdict
from datetime import date
from pathlib import Path

import polars as pl

from lshjob.contracts.manifest import Manifest
from lshjob.core.sets import ElementSets
from lshjob.index import publish
from lshjob.jobs import refresh_index as index_state
from lshjob.jobs import refresh_publish
from lshjob.jobs.prepare import plan_run
from lshjob.jobs.refresh_fold import Folded, scan_periods
from lshjob.plan.banding import target_recall_of
from lshjob.plan.choose import Plan
from lshjob.plan.similarity import sample_keys
from lshjob.runtime import provenance
from lshjob.runtime.budget import default_memory, parse_size, peak_bytes, reset_peak
from lshjob.sign.signatures import SignatureParams


class Clock:
    """Seconds and peak memory of each step."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self.peak: dict[str, int] = {}

    @contextmanager
    def __call__(self, name: str):
        reset_peak()
        start = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = round(self.seconds.get(name, 0.0) + time.perf_counter() - start, 3)
            self.peak[name] = max(self.peak.get(name, 0), peak_bytes())


def memory_of(options) -> int:
    return parse_size(options.memory) if options.memory else default_memory()


def touched_entities(store: Path, batch_rows: pl.DataFrame, expired) -> pl.Series:
    """Entities whose window set may have changed: those of the batch's rows within the
    window and those of the periods that left it."""
    keys = [batch_rows.select("entity")]
    if expired:
        keys.append(scan_periods(store, expired).select("entity").unique().collect())
    return pl.concat(keys).unique()["entity"]


def sample_of(members: pl.DataFrame, run_options, seed: int) -> pl.Series:
    """The entities of the planning sample: ``sample_size`` of ``members``, uniform, drawn with ``seed``."""
    return sample_keys(members["entity"], run_options.sample_size, seed)


def sampled_recall(store: Path, members: pl.DataFrame, folded: Folded, plan: dict, run_options,
                   seed: int, sets: ElementSets | None = None) -> tuple[float | None, dict]:
    """The kept plan's expected recall (the planner's own formula, 1 - (1 - s^r)^b over the
    pair histogram) on a new uniform sample of the window's entities (:func:`sample_of`; their
    ``sets`` when already read), and the plan as judged (its ``predicted`` and ``sample``)."""
    keys = members["entity"]
    if sets is None:
        sets = index_state.window_sets(store, folded, sample_of(members, run_options, seed))
    if sets.size < 2:
        return None, {}
    judged = plan_run(sets, run_options, total_entities=len(keys))
    figures = judged.to_dict()
    return target_recall_of(figures.get("predicted", {})), figures


def plan_from_window(store: Path, folded: Folded, run_options,
                     sets: ElementSets | None = None) -> tuple[Plan, ElementSets]:
    """The planner's choice on the window's sets, as ``lshjob run`` makes it (every set held),
    and those sets (read here when not given: a build from nothing then reuses them)."""
    if sets is None:
        sets = index_state.window_sets(store, folded, None)
    fa, fb = index_state.set_prints(sets)
    distinct = pl.DataFrame({"fa": fa, "fb": fb}).unique().height
    return plan_run(sets, run_options, distinct_sets=distinct), sets


def build(store: Path, previous: index_state.IndexState, folded: Folded, touched: pl.Series | None,
          run_options, work: Path, run_id: str, clock: Clock, sets: ElementSets | None = None,
          extra=None) -> index_state.Update:
    """The state after reading ``touched`` anew (all entities when None; ``sets``: their window
    sets when already read; ``extra``: see :func:`lshjob.jobs.refresh_index.update`); raises
    :class:`lshjob.jobs.refresh_index.Oversize`."""
    plan = previous.plan
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"])
    if sets is None:
        with clock("read_sets"):
            sets = index_state.window_sets(store, folded, touched)
    return index_state.update(store, previous, folded, sets, touched, params,
                              run_options.stage_engine("band"), run_options.stage_engine("verify"), work, run_id,
                              clock, extra)


def publish_state(upd: index_state.Update, last: Path | None, totals: dict | None, built: Path, run_options,
                  plan: dict, plan_figures: dict, spec, events, clock: Clock, run_id: str, counts: dict,
                  warnings: list[str]) -> tuple[dict, dict | None, dict]:
    """Publish the state's index into ``built`` (neighbours.parquet and manifest.json) as the
    run's publish stage does: only the affected entities' lists when ``last`` (the version the
    updated state was made from) and its ``totals`` are given (:mod:`lshjob.jobs.refresh_publish`),
    else every list. Return the manifest, the diff summary against ``last`` (None when not
    made here) and the new version's totals."""
    memory = memory_of(run_options)
    started_at = provenance.utc_now()
    state = upd.state
    entities = len(state.members)
    top_k = publish.effective_top_k(run_options.top_k, entities)
    if top_k < run_options.top_k and entities > 1:
        warnings.append(f"--top-k {run_options.top_k} is more than the {entities - 1} other entities; used {top_k}")
    meta = provenance.neighbours_metadata(run_id, run_options, spec, top_k)
    diff = None
    if publish.effective_top_k(run_options.top_k, upd.entities_before) != top_k:
        last = None  # every list's length may change: all are made anew
    with clock("publish"):
        if last is not None and totals is not None:
            old_rows = pl.read_parquet(last / publish.NEIGHBOURS)
            rows, moved = refresh_publish.changed_rows(upd, old_rows, top_k, plan["bands"], memory)
            counts = dict(counts, affected_entities=len(moved))
            facts = publish.stage_neighbours(built, [rows], meta)
        else:
            blocks, _ = refresh_publish.rows_of(state.members, state.pairs, top_k, plan["bands"], memory)
            facts = publish.stage_neighbours(built, blocks, meta)
        staged = publish.staging_folder(built)
        (staged / publish.NEIGHBOURS).replace(built / publish.NEIGHBOURS)
        publish.discard_staging(built)
    with clock("diff"):
        if last is not None and totals is not None:
            diff, totals = refresh_publish.restricted_diff(old_rows, rows, moved, totals, str(last), str(built))
            diff = dict(diff, old_run_id=last.name)
            del old_rows, rows
        else:
            totals = refresh_publish.listed_totals(pl.read_parquet(built / publish.NEIGHBOURS))
    counts = dict(counts, entities=entities, representatives=state.sets.height,
                  verified_pairs_kept=state.pairs.height, published_rows=facts["rows"])
    if facts["rows"] == 0 and entities > 1:
        warnings.append("no pair reached the threshold: the index is empty")
    manifest = Manifest(
        run_id=run_id, started_at=provenance.iso(started_at), host=provenance.host(), command=None,
        inputs={"source": str(Path(events).absolute()), "given": str(events)},
        spec=asdict(spec), options=asdict(run_options), top_k_effective=top_k, memory_budget_bytes=memory,
        plan=dict(plan_figures, perms=plan["perms"], bands=plan["bands"], rows=plan["rows"]),
        engines=run_options.engine_names(), counts=counts, skew=None, peak_memory_bytes=clock.peak,
        versions=provenance.versions(), output=facts, out=str(built), warnings=warnings,
        seconds=dict(clock.seconds, total=round(sum(clock.seconds.values()), 3)),
        finished_at=provenance.iso(provenance.utc_now()),
    ).to_json()
    return manifest, diff, totals


def sample_seed(window_last: date) -> int:
    """A new sample each period: the seed is the window's newest period (as a day number)."""
    return window_last.toordinal()
