"""A scheduled rebuild over a sliding window: ``lshjob refresh``.

Each refresh folds a batch of events into the store (:mod:`lshjob.store`), one file per
period of each entity's distinct elements and one of their signatures; drops the periods
that left the window; and publishes the index of the window. The index is built by the run
(:func:`lshjob.jobs.run.run_job`) over the window's membership rows, recomposed from the
store, with the plan the store keeps (perms, bands, rows, seed, scheme): so it holds exactly
the rows ``lshjob run`` builds from the window's events with that plan. (Every stage runs on
the whole window each time; the per-period signatures are kept for a refresh that re-bands
only the entities that changed, by the element-wise minimum over their periods.)

The first refresh into an empty store lets the planner choose (data mode) and keeps its
plan. A later refresh keeps it while the planner's expected recall of it, judged on the
window's sample, still meets ``--recall`` (less :data:`RECALL_SLACK`); below it (or with another threshold, seed or
scheme) the refresh re-plans, rebuilds and says why.

Order of the writes, so that a refresh killed at any moment (SIGKILL included) leaves the
store and the index readable and consistent:

1. the store's lock (one refresh per store: exit 75 for a second) and the index's lock;
   what killed refreshes left in the store is removed;
2. the new period files, and the index built into ``STORE/versions/RUN`` (temporary names,
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
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import polars as pl

from lshjob.errors import ParameterError
from lshjob.index import publish
from lshjob.ingest.spec import PERIODS, EventSpec
from lshjob.jobs import refresh_fold as folding
from lshjob.jobs.diff import diff_indexes
from lshjob.jobs.options import default_of
from lshjob.jobs.run import RunOptions, run_job
from lshjob.runtime import provenance, stopping
from lshjob.runtime.folder_lock import output_lock
from lshjob.runtime.outputs import output_folder
from lshjob.runtime.progress import QUIET, StageProgress
from lshjob.sign.signatures import SignatureParams
from lshjob.sign.slices import sign_sets
from lshjob.store import catalog
from lshjob.store import files as store_files

STORE_FORMAT = "lshjob-store"
# The planner keeps the cheapest plan at or above --recall, so its recall sits at the target:
# a kept plan is judged against the target less this slack, or a new sample's noise alone
# would re-plan most refreshes.
RECALL_SLACK = 0.02
DIFF_PATHS = ("old", "new", "out")  # of the diff summary: folders of the store's work, not kept


@dataclass(frozen=True)
class RefreshOptions:
    window: int
    threshold: float
    top_k: int = default_of("top_k")  # the run's defaults, declared once (lshjob.jobs.options)
    keep: int = 3  # published indexes kept in the store
    recall: float = default_of("recall")
    seed: int | None = None  # None: the kept plan's (1 for a new store)
    scheme: str | None = None  # None: the kept plan's (kperm for a new store)
    sample_size: int = default_of("sample_size")
    max_bucket: int = default_of("max_bucket")
    max_candidates: float = default_of("max_candidates")
    memory: str | None = default_of("memory")
    wait: float = default_of("wait")

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
        return RunOptions(threshold=self.threshold, top_k=self.top_k, recall=self.recall,
                          perms=plan["perms"] if banded else None, bands=plan["bands"] if banded else None,
                          rows=plan["rows"] if banded else None, seed=seed, scheme=scheme,
                          sample_size=self.sample_size, max_bucket=self.max_bucket,
                          max_candidates=self.max_candidates, memory=self.memory)


def refresh_job(events: str | Path, store: str | Path, spec: EventSpec, options: RefreshOptions, out: str | Path,
                progress: StageProgress = QUIET, command: list[str] | None = None) -> dict:
    """Fold ``events`` into ``store`` and publish the window's index into ``out``; return the
    manifest written (``lshjob run``'s, with ``plan`` holding seed and scheme, and ``refresh``)."""
    options.validate()
    if spec.time is None or spec.period not in PERIODS:
        raise ParameterError(f"--period must be one of {', '.join(PERIODS)}, with --time")
    store = output_folder(store, [events], "refresh", what="a store folder", option="--store")
    out = output_folder(out, [events], "refresh")
    if _inside(out, store) or _inside(store, out):
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
                            store_lock.notes + out_lock.notes)
        finally:
            publish.discard_staging(out)
            out_lock.release()
    finally:
        shutil.rmtree(store / store_files.WORK, ignore_errors=True)
        store_lock.release()


def _refresh(events, store, spec, options, out, progress, command, run_id, started, started_at, warnings):
    state = catalog.read_state(store)
    damaged = store_files.check_files(store, state)
    if damaged:
        raise ParameterError(f"{store}: the store is damaged ({damaged[0]}"
                             + (f"; and {len(damaged) - 1} more" if len(damaged) > 1 else "")
                             + "); start a new store")
    removed = store_files.remove_strays(store, state)
    if removed:
        warnings.append(f"removed {len(removed)} file(s) a killed refresh left in the store (e.g. {removed[0]})")
    _check_facts(state, spec, store)
    seconds: dict[str, float] = {}

    tick = time.perf_counter()
    batch = folding.read_batch(events, spec, state, options.window)
    folded = folding.fold(store, state, batch, run_id)
    window_path = store / store_files.WORK / "window.parquet"
    window_rows = folding.write_window(store, folded.periods, folded.changed, spec, window_path)
    changed = folding.changed_entities(store, state.periods, folded.periods, folded.changed)
    seconds["fold"] = round(time.perf_counter() - tick, 3)
    if state.periods and len(folded.expired) == len(state.periods):
        warnings.append(f"the window moved past every period the store held (the newest event is in the period "
                        f"of {batch.window_last.isoformat()}): all {len(state.periods)} expired")
    if batch.rows_older_than_window:
        warnings.append(f"{batch.rows_older_than_window} event(s) older than the window (before "
                        f"{batch.window_first.isoformat()}) were dropped")

    plan, why = _plan_to_use(state.plan, options)
    built = store / store_files.WORK / "index"
    run_spec = EventSpec(entity=spec.entity, element=spec.element, unicode=spec.unicode)
    manifest = run_job(window_path, run_spec, options.run_options(plan), built, progress)
    predicted = manifest["plan"].get("predicted", {}).get("expected_recall")
    if plan is not None and why is None and predicted is not None and predicted < options.recall - RECALL_SLACK:
        why = (f"the kept plan's expected recall on this window's sample, {predicted:.4f}, is below "
               f"--recall {options.recall} less {RECALL_SLACK}: re-planned and rebuilt")
        plan = None
        shutil.rmtree(built)
        manifest = run_job(window_path, run_spec, options.run_options(None), built, progress)
    rebuilt = plan is None
    run_opts = options.run_options(plan)
    kept = {"perms": manifest["plan"].get("perms"), "bands": manifest["plan"].get("bands"),
            "rows": manifest["plan"].get("rows"), "seed": run_opts.seed, "scheme": run_opts.scheme,
            "mode": manifest["plan"]["mode"] if rebuilt else state.plan["mode"],
            "threshold": options.threshold, "recall": options.recall,
            "chosen_by": run_id if rebuilt else state.plan["chosen_by"]}
    for name, value in manifest["seconds"].items():
        seconds[f"run.{name}"] = value

    previous = store / store_files.VERSIONS / state.versions[-1].folder if state.versions else None
    added, removed, diff = _pair_changes(previous, built)
    tick = time.perf_counter()
    stored = _store_periods(store, folded, kept, rebuilt, run_id, {f.path: f for f in state.files})
    seconds["sign_periods"] = round(time.perf_counter() - tick, 3)

    summary = {"store": str(store.absolute()), "events": str(events), "window": options.window,
               "period": spec.period, "window_first": batch.window_first.isoformat(),
               "window_last": batch.window_last.isoformat(), "window_periods": len(folded.periods),
               "window_rows": window_rows, "batch_rows": batch.rows_read,
               "null_rows_dropped": batch.null_rows_dropped,
               "rows_older_than_window": batch.rows_older_than_window, "changed_entities": changed,
               "pairs_added": added, "pairs_removed": removed,
               "pairs_jaccard_changed": diff["pairs_jaccard_changed"] if diff else 0,
               "churn_rate": diff["churn_rate"] if diff else None,
               "periods_changed": len(folded.changed), "periods_expired": len(folded.expired),
               "rebuilt": rebuilt, "why": why or "kept plan", "design": "full run over the window"}
    seconds["total"] = round(time.perf_counter() - started, 3)  # to the index built and the store's files written
    manifest = dict(manifest, command=list(command) if command is not None else None,
                    plan=dict(manifest["plan"], seed=kept["seed"], scheme=kept["scheme"]),
                    out=str(out.absolute()), run_id=run_id, started_at=provenance.iso(started_at),
                    refresh=summary, warnings=warnings + manifest["warnings"],
                    seconds=dict(manifest["seconds"], refresh=seconds))
    manifest = json.loads(json.dumps(manifest, default=str))  # what the file holds, exactly
    version = store / store_files.VERSIONS / run_id
    _write_json(built / publish.MANIFEST, manifest)
    version.parent.mkdir(parents=True, exist_ok=True)
    os.replace(built, version)

    versions = [*state.versions, catalog.Version(run_id, run_id, manifest["output"]["sha256"],
                                                  manifest["output"]["rows"])][-options.keep:]
    dropped_versions = [v for v in state.versions if v not in versions]
    new_state = catalog.State(facts=dict(_facts(spec), **batch.key_types), plan=kept, periods=stored["periods"],
                              files=stored["files"], versions=versions)
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
    _link_or_copy(version / publish.NEIGHBOURS, staging / publish.NEIGHBOURS)
    with stopping.held():  # the index is renamed whole or not at all
        publish.commit_index(out, manifest)
        stopping.mark_published()
    catalog.mark_published(store, run_id)
    return manifest


def _pair_changes(previous: Path | None, built: Path) -> tuple[int, int, dict | None]:
    """Unordered pairs of the published index added and removed since the previous version
    (all of them added on a first refresh), and the summary of :func:`lshjob.jobs.diff.diff_indexes`
    between the two (None on a first refresh), as the run's record keeps it."""
    if previous is None:
        rows = pl.scan_parquet(built / publish.NEIGHBOURS)
        pairs = rows.select(pl.min_horizontal("entity", "neighbour").alias("a"),
                            pl.max_horizontal("entity", "neighbour").alias("b")).unique()
        return int(pairs.select(pl.len()).collect().item()), 0, None
    summary = diff_indexes(previous, built)
    kept = {k: v for k, v in summary.items() if k not in DIFF_PATHS}
    return summary["pairs_added"], summary["pairs_removed"], dict(kept, old_run_id=previous.name)


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


def _store_periods(store: Path, folded: folding.Folded, plan: dict, rebuilt: bool, run_id: str,
                   known: dict[str, catalog.StoredFile]) -> dict:
    """Write the changed periods' sets and every period's signatures that this plan has not
    signed yet; return the catalog's periods and files."""
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"]) if plan["perms"] else None
    held = {p.period: p for p in folded.periods}
    periods, files = [], []
    for p in folded.periods:
        if p.period in folded.changed:
            files.append(store_files.write_table(store, p.sets_file, folded.changed[p.period], "sets", run_id))
        else:
            files.append(known.get(p.sets_file) or _entry(store, p.sets_file, "sets", p.run_id))
        signatures = p.signatures_file
        if params is not None and (rebuilt or signatures is None or p.period in folded.changed):
            table = folded.changed.get(p.period)
            if table is None:
                table = store_files.read_table(store, held[p.period].sets_file)
            signatures = store_files.period_file(p.period, run_id, "signatures")
            files.append(store_files.write_table(store, signatures, sign_sets(table, ["entity"], params),
                                                 "signatures", run_id))
        elif params is None:
            signatures = None
        elif signatures is not None:
            files.append(known.get(signatures) or _entry(store, signatures, "signatures", p.run_id))
        periods.append(catalog.Period(p.period, p.sets_file, signatures, p.entities, p.membership_rows,
                                      p.run_id))
    return {"periods": periods, "files": files}


def _entry(store: Path, relative: str, kind: str, run_id: str) -> catalog.StoredFile:
    path = Path(store) / relative
    return catalog.StoredFile(relative, kind, store_files.sha256_of(path), path.stat().st_size, run_id)


def _facts(spec: EventSpec) -> dict[str, str]:
    return {"format": STORE_FORMAT, "format_version": "1", "spec": json.dumps(asdict(spec), sort_keys=True),
            "period": spec.period}


def _check_facts(state: catalog.State, spec: EventSpec, store: Path) -> None:
    if state.facts.get("period") not in (None, spec.period):
        raise ParameterError(f"--store {store} keeps {state.facts['period']} periods; got --period {spec.period} "
                             "(start a new store for another period)")


def _write_json(path: Path, data: dict) -> None:
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")
    os.replace(temporary, path)


def _link_or_copy(source: Path, target: Path) -> None:
    try:
        os.link(source, target)
    except OSError:
        shutil.copyfile(source, target)


def _inside(path: Path, folder: Path) -> bool:
    path, folder = Path(os.path.realpath(path)), Path(os.path.realpath(folder))
    return path == folder or folder in path.parents


def history(store: str | Path) -> dict:
    """Every refresh of ``store``, oldest first: id, start and end, window, batch rows, changed
    entities, seconds and peak memory per stage, plan, output SHA-256; and the versions kept."""
    store = Path(store)
    if not (store / catalog.CATALOG).is_file():
        raise ParameterError(f"{store}: no {catalog.CATALOG}; is this a store made by lshjob refresh?")
    state = catalog.read_state(store)
    return {"store": str(store.absolute()), "runs": catalog.runs(store), "plan": state.plan,
            "periods": [p.period.isoformat() for p in state.periods],
            "versions": [{"run_id": v.run_id, "folder": str(store / store_files.VERSIONS / v.folder),
                          "sha256": v.sha256, "rows": v.rows} for v in state.versions]}
