"""A scheduled rebuild over a sliding window: ``lshjob refresh``.

Each refresh folds a batch of events into the store (:mod:`lshjob.store`), one file per
period of each entity's distinct elements and one of their signatures; drops the periods
that left the window; and publishes the index of the window, which holds exactly the rows
``lshjob run`` builds from the window's events with the plan the store keeps (perms, bands,
rows, seed, scheme). It is made one of two ways:

* from the store's state of the last index (:mod:`lshjob.jobs.refresh_index`): only the
  entities the batch or an expired period touched are read, only their new sets signed and
  banded, only pairs with a new set joined and verified, every other verified pair kept
  (:mod:`lshjob.jobs.refresh_paths`); the first refresh, one with a new plan, or one whose
  batch and expired periods touch :data:`WHOLE_WINDOW_SHARE` or more of the entities builds
  that state for the whole window (``path`` ``whole_window``, the reason in ``why``);
* by the run (:func:`lshjob.jobs.run.run_job`) over the window's membership rows, recomposed
  from the store: with ``full`` (``--full``), for a plan without bands, or when a bucket
  would pass ``--max-bucket`` (the run's join splits such buckets; the state does not).

The first refresh into an empty store lets the planner choose (data mode) and keeps its
plan. A later refresh keeps it while the planner's expected recall of it, judged on the
window's sample (a new uniform sample each refresh), still meets ``--recall`` (less
:data:`RECALL_SLACK`); below it (or with another threshold, seed or scheme) the refresh
re-plans, rebuilds and says why (in the manifest, the history and on stderr).

Order of the writes, so that a refresh killed at any moment (SIGKILL included) leaves the
store and the index readable and consistent:

1. the store's lock (one refresh per store: exit 75 for a second) and the index's lock;
   what killed refreshes left in the store is removed;
2. the new period and state files, and the index built into ``STORE/versions/RUN`` (temporary names,
   renamed); nothing in the catalog names them yet, so a kill here leaves the previous state;
3. the catalog, in one transaction: periods, files with their SHA-256, plan, versions kept
   (``--keep``), and the run;
4. files the catalog no longer names are removed; the index is renamed into ``--out``
   (:func:`lshjob.index.publish.commit_index`) and the run marked published. A kill between
   3 and 4 leaves the previous index in place; the next refresh publishes the store's.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from lshjob.errors import InputError, ParameterError
from lshjob.index import publish
from lshjob.ingest.spec import PERIODS, EventSpec
from lshjob.jobs import refresh_fold as folding
from lshjob.jobs import refresh_index as index_state
from lshjob.jobs import refresh_paths as paths
from lshjob.jobs import refresh_store as stored
from lshjob.jobs.options import EngineChoice, default_of
from lshjob.jobs.run import RunOptions, run_job
from lshjob.runtime import provenance, stopping
from lshjob.runtime.folder_lock import output_lock
from lshjob.runtime.outputs import output_folder
from lshjob.runtime.progress import QUIET, StageProgress
from lshjob.store import catalog
from lshjob.store import files as store_files

INDEX_STATE = "index_state"  # the catalog's fact naming the state of the last index (refresh_index)
# The planner keeps the cheapest plan at or above --recall, so its recall sits at the target: a kept plan is
# judged against the target less this slack, or a new sample's noise alone would re-plan most refreshes.
RECALL_SLACK = 0.02
# Share of the last index's entities touched (by the batch or an expired period) at or above which
# the state is rebuilt from the whole window instead of updated. The update's join and
# verification grow with the new sets (1M patrons: 0.72x of a full run at 5% touched, 1.40x at
# 20%, 3.9-4x at 38-99%), but a rebuild costs several full runs too; side by side at 100,000
# patrons (bench/RESULTS.md, "the switch") the update won at 20% and 41% touched, the rebuild at 99%.
WHOLE_WINDOW_SHARE = 0.5


@dataclass(frozen=True)
class RefreshOptions(EngineChoice):  # engine: local, or spark (README, "Refresh on Spark")
    window: int
    threshold: float
    top_k: int = default_of("top_k")  # the run's defaults, declared once (lshjob.jobs.options)
    keep: int = 3  # published indexes kept in the store
    recall: float = default_of("recall")
    recall_of: str = default_of("recall_of")  # "lists": --recall is the top-k lists' (as lshjob run --recall-of)
    seed: int | None = None  # None: the kept plan's (1 for a new store)
    scheme: str | None = None  # None: the kept plan's (kperm for a new store)
    sample_size: int = default_of("sample_size")
    max_bucket: int = default_of("max_bucket")
    max_candidates: float = default_of("max_candidates")
    memory: str | None = default_of("memory")
    wait: float = default_of("wait")
    full: bool = False  # run the whole job over the window instead of updating the index state

    def validate(self) -> None:
        if self.window < 1:
            raise ParameterError(f"--window must be at least 1 period; got {self.window}")
        if self.keep < 1:
            raise ParameterError(f"--keep must be at least 1 version; got {self.keep}")
        self.run_options(None).validate()

    def run_options(self, plan: dict | None) -> RunOptions:
        seed = self.seed if self.seed is not None else (plan or {}).get("seed", 1)
        scheme = self.scheme or (plan or {}).get("scheme", "kperm")
        banded = plan is not None and plan.get("bands") is not None
        return RunOptions(threshold=self.threshold, top_k=self.top_k, recall=self.recall, recall_of=self.recall_of,
                          perms=plan["perms"] if banded else None, bands=plan["bands"] if banded else None,
                          rows=plan["rows"] if banded else None, seed=seed, scheme=scheme, sample_size=self.sample_size,
                          max_bucket=self.max_bucket, max_candidates=self.max_candidates, memory=self.memory,
                          **self.engine_options())


def refresh_job(events: str | Path, store: str | Path, spec: EventSpec, options: RefreshOptions, out: str | Path,
                progress: StageProgress = QUIET, command: list[str] | None = None,
                say: Callable[[str], None] | None = None) -> dict:
    """Fold ``events`` into ``store`` and publish the window's index into ``out``; return the
    manifest written (``lshjob run``'s, with ``plan`` holding seed and scheme, and ``refresh``).
    ``say``: where the one-line notices go (the path taken, a re-plan); stderr by default."""
    say = _say if say is None else say
    options.validate()
    if spec.time is None or spec.period not in PERIODS:
        raise ParameterError(f"--period must be one of {', '.join(PERIODS)}, with --time")
    store = output_folder(store, [events], "refresh", what="a store folder", option="--store")
    out = output_folder(out, [events], "refresh")
    if stored.inside(out, store) or stored.inside(store, out):
        raise ParameterError(f"--out {out} and --store {store} must be apart (neither inside the other)")
    if not store_files.is_store(store):
        raise ParameterError(f"--store {store} is a folder with other files and no {catalog.CATALOG}; "
                             "give a new or empty folder, or a store lshjob refresh made")
    started = time.perf_counter()
    started_at = provenance.utc_now()
    run_id = provenance.new_run_id(started_at)
    store_lock = output_lock(store, wait=options.wait, what="store").acquire()
    try:
        out_lock = output_lock(out, wait=options.wait, what="index").acquire()
        try:
            return _refresh(events, store, spec, options, out, progress, command, run_id, started, started_at,
                            store_lock.notes + out_lock.notes, say)
        finally:
            publish.discard_staging(out)
            out_lock.release()
    finally:
        shutil.rmtree(store / store_files.WORK, ignore_errors=True)
        store_lock.release()


def _refresh(events, store, spec, options, out, progress, command, run_id, started, started_at, warnings,
             say=None):
    say = _say if say is None else say
    state = catalog.read_state(store)
    damaged = store_files.check_files(store, state, size_only=("signatures", "buckets"),  # signatures: when read
                                      hash_below=store_files.HASH_BELOW)
    if damaged:
        more = f"; and {len(damaged) - 1} more" if len(damaged) > 1 else ""
        raise ParameterError(f"{store}: the store is damaged ({damaged[0]}{more}); start a new store")
    removed = store_files.remove_strays(store, state)
    if removed:
        warnings.append(f"removed {len(removed)} file(s) a killed refresh left in the store (e.g. {removed[0]})")
    stored.check_facts(state, spec, store)
    seconds: dict[str, float] = {}

    tick = time.perf_counter()
    batch = folding.read_batch(events, spec, state, options.window)
    folded = folding.fold(store, state, batch, run_id)
    seconds["fold"] = round(time.perf_counter() - tick, 3)
    if state.periods and len(folded.expired) == len(state.periods):
        warnings.append(f"the window moved past every period the store held (the newest event is in the period "
                        f"of {batch.window_last.isoformat()}): all {len(state.periods)} expired")
    if batch.rows_older_than_window:
        warnings.append(f"{batch.rows_older_than_window} event(s) older than the window (before "
                        f"{batch.window_first.isoformat()}) were dropped")
    if not folded.periods:
        raise InputError("no event falls in the window: nothing to index")

    plan, why = _plan_to_use(state.plan, options)
    built = store / store_files.WORK / "index"
    made = _by_state(store, state, batch, folded, plan, why, options, spec, events, built, run_id, warnings)
    if made is None:  # the whole run over the window's events
        manifest, plan, why, changed = _by_run(store, state, folded, plan, why, options, spec, built, progress,
                                               seconds)
        design, index_record, index_files, diff = "full run over the window", None, [], None
    else:
        manifest, plan, why, changed, index_record, index_files, diff = made
        design = "incremental" if not manifest["refresh_steps"]["rebuilt"] else "state built from the whole window"
        if "path_reason" in manifest["refresh_steps"]:
            say(manifest["refresh_steps"]["path_reason"])
        seconds.update({f"index.{k}": v for k, v in manifest["seconds"].items() if k != "total"})
    rebuilt = plan is None
    run_opts = options.run_options(plan)
    kept = {"perms": manifest["plan"].get("perms"), "bands": manifest["plan"].get("bands"),
            "rows": manifest["plan"].get("rows"), "seed": run_opts.seed, "scheme": run_opts.scheme,
            "mode": manifest["plan"]["mode"] if rebuilt else state.plan["mode"],
            "threshold": options.threshold, "recall": options.recall,
            "chosen_by": run_id if rebuilt else state.plan["chosen_by"]}
    if why is not None and state.plan is not None:
        say(why)

    previous = store / store_files.VERSIONS / state.versions[-1].folder if state.versions else None
    tick = time.perf_counter()
    if diff is None or previous is None or diff["old_run_id"] != previous.name:
        added, removed, diff = stored.pair_changes(previous, built)
    else:  # made with the index, from the rows that changed (refresh_publish)
        added, removed = diff["pairs_added"], diff["pairs_removed"]
    seconds["diff"] = round(time.perf_counter() - tick, 3)
    tick = time.perf_counter()
    periods_made = stored.store_periods(store, folded, kept, rebuilt, run_id, {f.path: f for f in state.files})
    seconds["sign_periods"] = round(time.perf_counter() - tick, 3)

    summary = {"store": str(store.absolute()), "events": str(events), "window": options.window,
               "period": spec.period, "window_first": batch.window_first.isoformat(),
               "window_last": batch.window_last.isoformat(), "window_periods": len(folded.periods),
               "period_rows": sum(p.membership_rows for p in folded.periods), "batch_rows": batch.rows_read,
               "null_rows_dropped": batch.null_rows_dropped,
               "rows_older_than_window": batch.rows_older_than_window, "changed_entities": changed,
               "pairs_added": added, "pairs_removed": removed,
               "pairs_jaccard_changed": diff["pairs_jaccard_changed"] if diff else 0,
               "churn_rate": diff["churn_rate"] if diff else None,
               "periods_changed": len(folded.changed), "periods_expired": len(folded.expired),
               "rebuilt": rebuilt, "design": design,
               "path": "full_run" if made is None else "incremental" if design == "incremental" else "whole_window",
               "why": why or (made[0]["refresh_steps"].get("path_reason") if made else None) or "kept plan"}
    if made is not None:
        summary["steps"] = manifest.pop("refresh_steps")
    seconds["total"] = round(time.perf_counter() - started, 3)  # to the index built and the store's files written
    manifest = dict(manifest, command=list(command) if command is not None else None,
                    plan=dict(manifest["plan"], seed=kept["seed"], scheme=kept["scheme"]),
                    out=str(out.absolute()), run_id=run_id, started_at=provenance.iso(started_at),
                    refresh=summary, warnings=warnings + manifest["warnings"],
                    seconds=dict(manifest["seconds"], refresh=seconds))
    manifest = json.loads(json.dumps(manifest, default=str))  # what the file holds, exactly
    version = store / store_files.VERSIONS / run_id
    stored.write_json(built / publish.MANIFEST, manifest)
    version.parent.mkdir(parents=True, exist_ok=True)
    os.replace(built, version)

    versions = [*state.versions, catalog.Version(run_id, run_id, manifest["output"]["sha256"],
                                                  manifest["output"]["rows"])][-options.keep:]
    dropped_versions = [v for v in state.versions if v not in versions]
    facts = dict(stored.facts(spec), **batch.key_types)
    if index_record is not None:
        facts[INDEX_STATE] = json.dumps(index_record, sort_keys=True)
    new_state = catalog.State(facts=facts, plan=kept, periods=periods_made["periods"],
                              files=periods_made["files"] + index_files, versions=versions)
    run = dict(run_id=run_id, started_at=provenance.iso(started_at), finished_at=provenance.iso(provenance.utc_now()),
               window_first=batch.window_first, window_last=batch.window_last, window_periods=len(folded.periods),
               batch_rows=batch.rows_read, rows_older_than_window=batch.rows_older_than_window,
               changed_entities=changed, pairs_added=added, pairs_removed=removed,
               periods_changed=len(folded.changed), periods_expired=len(folded.expired),
               entities=manifest["counts"]["entities"], rebuilt=rebuilt, why=summary["why"], seconds=seconds["total"],
               stage_seconds=seconds, peak_memory_bytes=manifest["peak_memory_bytes"], plan=kept,
               output_sha256=manifest["output"]["sha256"], published_rows=manifest["output"]["rows"],
               published=False, out=str(out.absolute()), diff=diff)
    catalog.commit(store, new_state, run)  # the store is now this refresh's

    kept_paths = {f.path for f in new_state.files}
    store_files.remove_paths(store, [f.path for f in state.files if f.path not in kept_paths]
                             + [f"{store_files.VERSIONS}/{v.folder}" for v in dropped_versions])
    staging = publish.staging_folder(out)
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir(parents=True)
    stored.link_or_copy(version / publish.NEIGHBOURS, staging / publish.NEIGHBOURS)
    with stopping.held():  # the index is renamed whole or not at all
        publish.commit_index(out, manifest)
        stopping.mark_published()
    catalog.mark_published(store, run_id)
    return manifest


def _say(why: str) -> None:
    print(f"lshjob refresh: {why}", file=sys.stderr)


def _by_run(store, state, folded, plan, why, options, spec, built, progress, seconds):
    """The index by ``lshjob run`` over the window's events (the full path)."""
    tick = time.perf_counter()
    window_path = store / store_files.WORK / "window.parquet"
    folding.write_window(store, folded, spec, window_path)
    changed = folding.changed_entities(store, state.periods, folded)
    seconds["window"] = round(time.perf_counter() - tick, 3)
    run_spec = EventSpec(entity=spec.entity, element=spec.element, unicode=spec.unicode)
    manifest = run_job(window_path, run_spec, options.run_options(plan), built, progress)
    predicted = paths.target_recall_of(manifest["plan"].get("predicted", {}))
    if plan is not None and why is None and predicted is not None and predicted < options.recall - RECALL_SLACK:
        why = (f"the kept plan's expected recall on this window's sample, {predicted:.4f}, is below "
               f"--recall {options.recall} less {RECALL_SLACK}: re-planned and rebuilt")
        plan = None
        shutil.rmtree(built)
        manifest = run_job(window_path, run_spec, options.run_options(None), built, progress)
    for name, value in manifest["seconds"].items():
        seconds[f"run.{name}"] = value
    return manifest, plan, why, changed


def _by_state(store, state, batch, folded, plan, why, options, spec, events, built, run_id, warnings):
    """The index from the store's state (:mod:`lshjob.jobs.refresh_paths`): updated for the
    touched entities when the state was made under the kept plan and the plan still meets
    the recall target on a new sample of the window, else built for the whole window; None
    when the full run must make it (--full, a plan without bands, a bucket over --max-bucket)."""
    if options.full or options.engine != "local" or (plan is not None and plan.get("bands") is None):
        return None
    clock = paths.Clock()
    record = json.loads(state.facts[INDEX_STATE]) if INDEX_STATE in state.facts else None
    work = store / store_files.WORK / "state"
    steps, made, from_nothing = {}, None, False

    seed = paths.sample_seed(batch.window_last)
    sample = lambda members: paths.sample_of(members, options.run_options(plan), seed)  # noqa: E731 (read with verify)

    def update(previous, touched, plan_now, sets=None, extra=None):
        try:
            return paths.build(store, previous, folded, touched,
                               options.run_options(plan_now), work, run_id, clock, sets, extra)
        except index_state.Oversize as exc:
            warnings.append(f"{exc}: the whole run made this index (the state needs no bucket over the cap)")
            return None

    last, totals = None, None
    if plan is not None and record is not None \
            and record["plan"] == index_state.state_plan(plan, options.max_bucket, options.top_k):
        with clock("touched"):
            touched = paths.touched_entities(store, batch.rows, folded.expired)
        previous = index_state.read_state(store, record)
        share = min(1.0, len(touched) / max(1, previous.members.height))
        if share >= WHOLE_WINDOW_SHARE:  # an update predicted slower than a build
            steps["path_reason"] = (f"the batch and expired periods touched {share:.0%} of the window's "
                                    f"entities, at least {WHOLE_WINDOW_SHARE:.0%}: the index state was rebuilt "
                                    "from the whole window (cheaper than updating it) under the kept plan")
            empty = index_state.IndexState.empty(previous.plan, batch.rows.schema["entity"])
            made, from_nothing = update(empty, None, plan, extra=sample), True
            if made is not None:
                made.changed_entities = index_state.changed_between(previous, made.state)
        else:
            made = update(previous, touched, plan, extra=sample)
            if made is not None and (store / store_files.VERSIONS / record.get("version", "-")).is_dir() \
                    and "totals" in record:
                last, totals = store / store_files.VERSIONS / record["version"], record["totals"]
        if made is None:
            return None
        with clock("sample"):  # the window after this batch, sampled anew
            recall, figures = paths.sampled_recall(store, made.state.members, folded, plan,
                                                   options.run_options(plan), seed, made.extra_sets)
        steps["sampled_recall"] = recall
        if recall is not None and recall < options.recall - RECALL_SLACK:
            why = (f"the kept plan's expected recall on a new sample of the window, {recall:.4f}, is below "
                   f"--recall {options.recall} less {RECALL_SLACK}: re-planned and rebuilt")
            plan, made, last, totals = None, None, None, None
        else:
            plan_now, figures = dict(plan), dict(figures, mode=plan["mode"], why="kept plan")
    if made is None:
        held = None  # the window's sets, read once for the plan and the build
        if plan is None:
            with clock("plan"):
                chosen, held = paths.plan_from_window(store, folded, options.run_options(None))
            if not chosen.banded:
                return None
            run_opts = options.run_options(None)
            figures = chosen.to_dict()
            plan_now = {"perms": chosen.perms, "bands": chosen.bands, "rows": chosen.rows, "seed": run_opts.seed,
                        "scheme": run_opts.scheme, "threshold": options.threshold}
        else:  # no state yet under the kept plan (a full run made the last index)
            plan_now, figures = dict(plan), {"mode": plan["mode"], "why": "kept plan"}
        empty = index_state.IndexState.empty(index_state.state_plan(plan_now, options.max_bucket, options.top_k),
                                             batch.rows.schema["entity"])
        made, from_nothing = update(empty, None, plan_now, held), True
        if made is None:
            return None
    record, files = index_state.write_state(store, made.state, run_id)
    known = {f.path: f for f in state.files}
    new_paths = {f.path for f in made.new_files}
    files += [known.get(p) or stored.entry(store, p, "buckets", run_id) for p in made.state.bucket_files
              if p not in new_paths] + made.new_files
    counts = {"changed_entities": made.changed_entities, "new_sets": made.new_sets,
              "forgotten_sets": made.forgotten_sets, "candidate_pairs": made.candidate_pairs,
              "verified_pairs": made.verified_pairs}
    manifest, diff, totals = paths.publish_state(made, last, totals, built, options.run_options(plan_now), plan_now,
                                                 figures, spec, events, clock, run_id, counts, [])
    record = dict(record, version=run_id, totals=totals)
    stored.write_json(built / publish.MANIFEST, manifest)  # read by the diff against the last version
    steps.update(counts, rebuilt=from_nothing, affected_entities=manifest["counts"].get("affected_entities"))
    manifest["refresh_steps"] = steps
    return manifest, plan, why, made.changed_entities, record, files, diff


def _plan_to_use(kept: dict | None, options: RefreshOptions) -> tuple[dict | None, str | None]:
    """The kept plan, or None (and why) when the planner must choose again."""
    if kept is None:
        return None, "first refresh of the store: plan chosen from the window's data and kept"
    if kept["threshold"] != options.threshold:
        return None, f"--threshold changed from {kept['threshold']} to {options.threshold}: re-planned and rebuilt"
    for name in ("seed", "scheme"):
        given = getattr(options, name)
        if given is not None and given != kept[name]:
            return None, f"--{name} changed from {kept[name]} to {given}: re-planned and rebuilt"
    if kept["bands"] is None and options.threshold < 1.0:
        return None, "the kept plan bands nothing (too few different sets then): re-planned and rebuilt"
    return kept, None



history = stored.history
