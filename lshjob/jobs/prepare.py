"""The run up to the join: ingest, collapse, plan, sign and band, in one part or in parts.

:func:`in_one_part` holds every set in memory; :func:`in_parts` reads the entities a key
range at a time (:mod:`lshjob.jobs.parts`). Both return a :class:`Prepared`: the entity keys,
each entity's representative, where the sets are (held, or saved per part), the plan and
the bucket files the join reads. :func:`lshjob.jobs.run.run_job` times each stage.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.errors import InputError
from lshjob.index import publish
from lshjob.index.band import ROW_BYTES, save_keys
from lshjob.index.collapse import collapse_identical, fingerprints, identical_candidates
from lshjob.index.join.base import JoinSettings
from lshjob.ingest.loading import EventSource, entity_counts, event_bytes, membership_of
from lshjob.ingest.spec import IngestReport
from lshjob.plan import similarity
from lshjob.plan.choose import Plan, choose_plan
from lshjob.runtime.budget import Budget, current_bytes, release_freed
from lshjob.runtime.partitions import HeldSets, PartStore, key_ranges, planning_sample
from lshjob.sign.signatures import SignatureParams, comparable_by_position

if TYPE_CHECKING:
    from lshjob.jobs.options import RunOptions


@dataclass
class Prepared:
    """What ingest, collapse, plan, sign and band leave for the join and later stages."""

    keys: pl.Series  # every entity key; entity id = position
    rep_of: np.ndarray
    representatives: int
    store: PartStore | HeldSets
    report: IngestReport
    plan: Plan
    params: SignatureParams | None = None
    bucket_files: list[Path] | None = None  # None: no bands (identical sets only)
    shared_rows: int = 0
    bucket_rows: int = 0
    # in parts: pairs of representatives of different parts whose sets may be identical (same
    # fingerprint), split by parts as the join writes them; with bands, moved beside its pairs
    candidates: Path | None = None
    identical_pairs: int = 0  # how many such pairs
    warnings: list[str] = field(default_factory=list)  # for the manifest


def in_one_part(source: EventSource, options: RunOptions, memory: int, work: Path, stages) -> Prepared:
    """The usual run: every set in memory at once."""
    with stages("ingest"):
        sets, report = membership_of(source, None)
    with stages("collapse"):
        rep_of, reps = collapse_identical(sets)
    _check_output(rep_of, sets.keys, options, memory)
    with stages("plan"):
        plan = plan_run(sets, options, distinct_sets=len(reps))
    built = Prepared(sets.keys, rep_of, len(reps), HeldSets(sets), report, plan,
                     warnings=_few_sets(sets.size, len(reps)))
    if plan.banded:
        built.params = plan.signature_params()
        # The bucket keys (8 bytes a band and representative) stay in memory when they fit
        # beside what the process holds, a slice's signatures and a batch of the band search
        # (an eighth of the budget each); else they go to the work folder, as in parts.
        release_freed()
        spill = None if Budget(memory).keys_stay_held(current_bytes(), len(reps), plan.bands) else work / "keys"
        bands = SignAndBand(built.params, plan, memory, stages, options.stage_engine("band"), spill=spill)
        with stages.progress.stage("sign and band", len(reps)) as task:
            bands.add(sets, reps, 0, task)
        built.bucket_files, built.shared_rows = bands.write(work / "buckets")
        built.bucket_rows = len(reps) * plan.bands
    return built


def in_parts(source: EventSource, options: RunOptions, memory: int, work: Path, stages) -> Prepared:
    """The run a key range at a time (:mod:`lshjob.jobs.parts`)."""
    with stages("count"):
        per_entity = entity_counts(source)
    with stages("plan"):
        # Half a part: the planner's histogram adds an inverted index of the sample.
        budget_events = Budget(memory).planner_sample_events(per_entity.height, event_bytes(source))
        sample = None
        if options.threshold < 1.0 and per_entity.height > 1:  # identical sets only need no sample
            sample, _ = membership_of(source, planning_sample(per_entity, budget_events))
        plan = plan_run(sample, options, total_entities=per_entity.height)
        del sample
    banded = plan.banded
    params = plan.signature_params() if banded else None
    # Verification holds two parts' sets (8 bytes an element, less than grouping them costs)
    # beside what the process holds now, its slices of candidates and their estimates (an
    # eighth and a sixteenth of the budget) and what DuckDB leaves resident after the join.
    release_freed()
    ranges = key_ranges(per_entity, Budget(memory).run_range_bytes(per_entity.height, current_bytes()), options.parts,
                        event_bytes=event_bytes(source))
    del per_entity
    store = PartStore(work / "sets", source.text_hashes)
    report = IngestReport(files=source.report.files, rows_read=source.report.rows_read,
                          null_rows_dropped=source.report.null_rows_dropped)
    keys, rep_of, representatives = [], [], 0
    band_engine = options.stage_engine("band")
    bands = SignAndBand(params, plan, memory, stages, band_engine, spill=work / "keys") if banded else None
    # each part's representatives' fingerprints, saved beside its sets (not held across parts),
    # to find identical sets across parts once the parts are freed
    prints = []
    with stages.progress.stage("parts", len(ranges)) as task:
        for selection in ranges:
            with stages.part("ingest"):
                sets, part_report = membership_of(source, selection)
            report.add_part(part_report)
            first = store.ranges[-1][1] + 1 if store.ranges else 0
            with stages.part("collapse"):
                fa, fb = fingerprints(sets)
                part_rep_of, reps = collapse_identical(sets, (fa, fb))
                prints.append(work / "prints" / f"part-{len(prints):06d}.parquet")
                prints[-1].parent.mkdir(parents=True, exist_ok=True)
                pl.DataFrame({"rep": reps + first, "fa": fa[reps], "fb": fb[reps]}).write_parquet(prints[-1])
            keys.append(sets.keys)
            rep_of.append(part_rep_of + first)
            representatives += len(reps)
            if banded:
                bands.add(sets, reps, first, None)
            with stages.part("ingest"):
                store.save(sets)
            del sets, part_rep_of, reps
            task.advance()
    if report.membership_rows == 0:
        raise InputError(f"{source.where}: no element is left after filtering (--min-count {source.min_count}); "
                         "nothing to sign")
    keys = pl.concat(keys)
    rep_of = np.concatenate(rep_of)
    _check_output(rep_of, keys, options, memory)  # groups within parts: a lower bound
    prepared = Prepared(keys, rep_of, representatives, store, report, plan, params,
                        warnings=_few_sets(len(keys), None))
    # identical sets of different parts, by fingerprint: with bands, beside the join's pairs
    # (:func:`lshjob.index.collapse.identical_candidates`)
    with stages.part("collapse"):
        prepared.candidates = work / ("identical" if banded else "candidates")
        prepared.identical_pairs = identical_candidates(pl.read_parquet(prints), store.ranges, prepared.candidates,
                                                        bands_shared=1 if banded else 0,
                                                        name="identical.parquet" if banded else "pairs.parquet")
    del prints
    if banded:
        prepared.bucket_files, prepared.shared_rows = bands.write(work / "buckets")
        prepared.bucket_rows = representatives * plan.bands
    return prepared


def _few_sets(entities: int, distinct: int | None) -> list[str]:
    """Why an index will hold no pair of different sets, when the input says so already."""
    if entities < 2:
        return [f"only {entities} entity: the index is empty"]
    if distinct == 1:
        return [f"all {entities} entities have the same set: the index pairs identical sets only"]
    return []


def _check_output(rep_of: np.ndarray, keys: pl.Series, options: RunOptions, memory: int) -> None:
    """Refuse, before signing, a top-k whose groups of identical sets alone would publish more
    rows than the budget holds (:func:`lshjob.index.publish.check_output`)."""
    top_k = publish.effective_top_k(options.top_k, len(keys))
    rows, _, largest = publish.identical_rows(rep_of, top_k)
    publish.check_output(rows, keys, options.top_k, memory, largest)


class SignAndBand:
    """Signs representatives a slice at a time and keeps only their bucket keys (8 bytes per
    band; in a file each under ``spill``, for a run in parts): a slice's signatures (raw and
    densified, laid out by position; polars reads them without a copy: at most 2 x 8k bytes a
    row) take at most an eighth of the budget. Then
    :meth:`write` writes the shared buckets' rows (both through the band ``engine``)."""

    def __init__(self, params, plan: Plan, memory, stages, engine, spill: Path | None = None) -> None:
        self.bands, self.rows = plan.bands, plan.rows
        # Bands read only the first b*r positions: k-permutation computes no more (its
        # positions are independent); oph fills no other empty bin.
        self.positions = self.bands * self.rows
        self.params, self.memory, self.stages, self.engine = params, memory, stages, engine
        self.step = Budget(memory).sign_slice_rows(self.positions, self.bands, ROW_BYTES)
        self.slices: list[pl.DataFrame | Path] = []
        self.spill = spill  # keys saved here (a run in parts), else kept in memory

    def add(self, sets: ElementSets, reps: np.ndarray, first: int, task) -> None:
        """Sign and band ``reps`` (ids within ``sets``); entity ids in the keys are ``first + id``."""
        for lo, hi in slice_bounds(len(reps), self.step):
            ids = reps[lo:hi]
            with self.stages.part("sign"):
                columns = comparable_by_position(sets, ids, self.params, self.positions)
            with self.stages.part("band"):
                keys = self.engine.keys(columns, ids + first, self.bands, self.rows)
                if self.spill is not None:
                    self.spill.mkdir(parents=True, exist_ok=True)
                    keys = save_keys(keys, self.spill / f"keys-{len(self.slices):06d}.parquet")
                self.slices.append(keys)
            del columns
            if task is not None:
                task.advance(len(ids))

    def write(self, out_dir: Path) -> tuple[list[Path], int]:
        with self.stages.part("band"):
            made = self.engine.shared_rows(self.slices, self.bands, out_dir, Budget(self.memory).band_batch_bytes())
        self.slices = []
        return made.files, made.rows_written


def plan_run(sets: ElementSets | None, options: RunOptions, total_entities: int | None = None,
             distinct_sets: int | None = None) -> Plan:
    """The run's plan (:func:`lshjob.plan.choose.choose_plan`), from exact Jaccard of a sample of
    ``sets`` (all entities, or a uniform sample of ``total_entities``). Without two different
    sets (``distinct_sets``, when known) or two entities, nothing is banded and nothing sampled;
    a sample left with fewer than two sets (its entities emptied by --min-count) gives no
    histogram, and the plan is made from theory."""
    n_entities = total_entities or sets.size
    distinct = min(n_entities, distinct_sets or n_entities)
    hist = None
    if options.threshold < 1.0 and distinct >= 2 and sets is not None and sets.size >= 2:
        # Against a uniform sample of a fraction f of the entities, a sampled entity meets only
        # a fraction f of its similar pairs: 1/f times as many sampled entities see as many pairs.
        sample = min(sets.size, int(options.sample_size * n_entities / sets.size))
        hist = similarity.sample_histogram_from_sets(sets, sample, seed=0, total_entities=n_entities,
                                                     threshold=options.threshold)
    costing = None
    if options.plan_by == "cost" and hist is not None:
        costing = _costing(n_entities, sets.elements.shape[0] * n_entities / max(sets.size, 1), distinct / n_entities,
                           options)
    return choose_plan(options.threshold, hist, perms=options.perms, bands=options.bands, rows=options.rows,
                       recall=options.recall, max_candidates=options.max_candidates, runners_up=0,
                       distinct_sets=distinct, seed=options.seed, scheme=options.scheme,
                       crowd_size=JoinSettings.crowd_size, plan_by=options.plan_by if hist is not None
                       else "candidates", costing=costing,
                       top_k=options.top_k if options.recall_of == "lists" else None)


def _costing(entities: int, rows: float, representative_share: float, options: RunOptions):
    """``--plan-by cost``: a plan's figures -> its total seconds predicted by this machine's cost
    model (:func:`lshjob.plan.cost.load_model`, the shipped default when never calibrated) for
    ``entities`` sets of ``rows`` membership rows in all, as ``lshjob plan --plan-by cost``
    costs them."""
    from lshjob.plan.cost import Workload, load_model

    model = load_model()
    return lambda figures: model.stage_seconds(Workload.predicted(
        figures, entities, rows, representative_share=representative_share, scheme=options.scheme,
        top_k=options.top_k))["total"]
