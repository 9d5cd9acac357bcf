"""The refresh's own index state, updated for the entities a batch changed (for :mod:`lshjob.jobs.refresh`).

A full run collapses identical sets, signs and bands one representative of each distinct set,
joins the bucket rows, verifies the candidates and publishes each entity's top-k. Everything
it keeps between those stages is a function of the *distinct sets* alone: two sets meet in a
band exactly when their signatures agree there, and their Jaccard, estimate and bands shared
depend on the two sets only (the one exception, buckets over ``--max-bucket`` that the join
splits, is left to the full run: below). So the store keeps, beside the periods, a state of
the last index (files named with the run that wrote them, their SHA-256 in the catalog):

* ``members`` (entity, set): the window's entities and the id of their set;
* ``sets`` (set, fa, fb): each distinct set's 128-bit fingerprint, the sums of two mixings of
  its elements' XXH64 (:func:`lshjob.index.collapse.fingerprints` over the element hashes, so
  the same set has the same fingerprint whatever refresh reads it); set ids only grow, a set
  that leaves the window is forgotten;
* ``buckets`` (band, bucket, set): every band's bucket of every set, one file per refresh
  holding the sets it made, sorted by band and bucket and looked up by binary search
  (:mod:`lshjob.jobs.refresh_buckets`; rows of forgotten sets are skipped by the join, and
  dropped when the files are compacted);
* ``pairs`` (left, right, jaccard, estimate, bands_shared): every verified pair of sets
  (left < right), not only the pairs the top-k publishes: an entity's list may need its
  (k+1)-th neighbour when one of its first k leaves.

A refresh reads the window sets of the entities its batch (or an expired period) touched,
keeps those whose fingerprint is unchanged, gives the others the id of an existing set with
their fingerprint or a new id, signs and bands only the new sets (the window signature of an
entity equals the element-wise minimum of its period signatures, :func:`compose_signatures`;
signing the union directly gives those values from the few sets read), joins their bucket
rows against the live rows of the same buckets, verifies only pairs with a new set, keeps every
other pair of live sets, and publishes through the run's own publish stage
(:mod:`lshjob.index.publish`), so the index holds exactly the rows ``lshjob run`` builds.
A bucket that a new set would take over ``--max-bucket`` makes the join of the full run
split it: the refresh then runs the whole job instead (:class:`Oversize`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.hashing import xxh64_integers
from lshjob.core.sets import ElementSets
from lshjob.index.collapse import fingerprints
from lshjob.index.verify import VerifySettings
from lshjob.jobs import refresh_buckets as buckets
from lshjob.jobs.refresh_fold import Folded, scan_periods
from lshjob.runtime.partitions import HeldSets
from lshjob.sign.signatures import SignatureParams, comparable_by_position
from lshjob.store import files as store_files
from lshjob.store.catalog import StoredFile

STATE = "state"  # folder of the state's files in the store
COMPACT_AFTER = 8  # bucket files kept before they are rewritten as one, without forgotten sets
SET_SCHEMA = {"set": pl.Int64, "fa": pl.UInt64, "fb": pl.UInt64}
PAIR_SCHEMA = {"left": pl.Int64, "right": pl.Int64, "jaccard": pl.Float64, "estimate": pl.Float64,
               "bands_shared": pl.Int32}

class Oversize(Exception):
    """A bucket would hold more sets than --max-bucket: the full run's join splits it."""


@dataclass
class IndexState:
    """The state of the last index (module docstring); ``files``: its catalog rows."""

    members: pl.DataFrame
    sets: pl.DataFrame
    pairs: pl.DataFrame
    bucket_files: list[str]
    next_set: int
    plan: dict

    @classmethod
    def empty(cls, plan: dict, entity: pl.DataType) -> IndexState:
        return cls(pl.DataFrame(schema={"entity": entity, "set": pl.Int64}), pl.DataFrame(schema=SET_SCHEMA),
                   pl.DataFrame(schema=PAIR_SCHEMA), [], 0, plan)


def state_plan(plan: dict, max_bucket: int, top_k: int) -> dict:
    """What the state (and the version published from it) depends on: a state made under
    another (or with bucket tables of another layout) is not used."""
    return {name: plan[name] for name in ("perms", "bands", "rows", "seed", "scheme", "threshold")} | {
        "max_bucket": max_bucket, "top_k": top_k, "bucket_tables": buckets.SUFFIX}


def read_state(store: Path, record: dict) -> IndexState:
    return IndexState(store_files.read_table(store, record["members"]), store_files.read_table(store, record["sets"]),
                      store_files.read_table(store, record["pairs"]), list(record["buckets"]),
                      int(record["next_set"]), record["plan"])


def write_state(store: Path, state: IndexState, run_id: str) -> tuple[dict, list[StoredFile]]:
    """Write the tables this run changed (a bucket file is never changed once written);
    return the catalog's record of the state and the files' rows (new ones only)."""
    written = []
    record = {"next_set": state.next_set, "plan": state.plan, "buckets": state.bucket_files}
    for name in ("members", "sets", "pairs"):
        relative = f"{STATE}/{run_id}.{name}.parquet"
        written.append(store_files.write_table(store, relative, getattr(state, name), name, run_id,
                                               compression="lz4" if name == "sets" else "zstd"))  # hashes: lz4
        record[name] = relative
    return record, written


def window_sets(store: Path, folded: Folded, wanted: pl.Series | None) -> ElementSets:
    """The window sets of the ``wanted`` entities (all when None), from the period files
    and the rows this refresh folds in."""
    rows = scan_periods(store, folded.periods, folded)
    if wanted is not None:
        rows = rows.filter(pl.col("entity").is_in(wanted.implode()))
    rows = rows.unique(["entity", "element"]).collect(engine="streaming")  # a few pages held at a time
    return ElementSets.from_sets(rows)


def set_prints(sets: ElementSets) -> tuple[np.ndarray, np.ndarray]:
    """Each set's fingerprint over its elements' XXH64 (the same set, the same value,
    whichever entities were read with it)."""
    if sets.text_hashes is None:
        hashes = xxh64_integers(sets.elements)
    else:
        hashes = np.asarray(sets.text_hashes, dtype=np.uint64)[sets.elements]
    return fingerprints(ElementSets(sets.keys, sets.offsets, hashes.view(np.int64)))


@dataclass
class Update:
    state: IndexState
    changed_entities: int
    new_sets: int
    forgotten_sets: int
    candidate_pairs: int
    verified_pairs: int
    new_files: list[StoredFile]
    moved_entities: pl.Series  # entities whose set changed (or that came or left)
    moved_sets: pl.Series  # their sets before and after
    pair_sets: pl.Series  # sets of a pair verified or forgotten by this update
    head_sets: pl.Series  # sets whose first top_k + 1 members (in key order) changed
    entities_before: int
    extra_sets: ElementSets | None = None  # the sets of the entities ``extra`` named, read with the verification's


def update(store: Path, previous: IndexState, folded: Folded, sets: ElementSets, touched: pl.Series | None,
           params: SignatureParams, band_engine, verify_engine, work: Path, run_id: str,
           clock, extra=None) -> Update:
    """The state after the entities ``touched`` (all when None: a build from nothing) were read
    anew (module docstring); ``sets``: their window sets (:func:`window_sets`). ``clock(name)``
    times a step; ``extra(members)``: more entities whose window sets to read in the same pass
    as the verification's (a planning sample of the new members). Raises :class:`Oversize`."""
    plan = previous.plan
    with clock("match_sets"):
        fa, fb = set_prints(sets)
        now = pl.DataFrame({"entity": sets.keys, "id": np.arange(sets.size, dtype=np.int64), "fa": fa, "fb": fb})
        known = previous.sets
        distinct = now.group_by("fa", "fb").agg(pl.col("id").min())
        # the few known sets with a fingerprint read (a filter on one column first: a join of two
        # 64-bit columns against every known set would build its table over all of them)
        met = known.filter(pl.col("fa").is_in(distinct["fa"].implode()))
        distinct = distinct.join(met, on=["fa", "fb"], how="left")
        made = distinct.filter(pl.col("set").is_null()).sort("id").with_columns(
            set=pl.int_range(previous.next_set, previous.next_set + pl.len(), dtype=pl.Int64))
        ids = pl.concat([distinct.filter(pl.col("set").is_not_null()), made]).select("fa", "fb", "set")
        now = now.join(ids, on=["fa", "fb"])
        kept = previous.members if touched is None else previous.members.filter(
            ~pl.col("entity").is_in(touched.implode()))
        if touched is None:
            kept = kept.clear()
        read_before = previous.members if touched is None else previous.members.filter(
            pl.col("entity").is_in(touched.implode()))
        before = read_before.join(now.select("entity", pl.col("set").alias("now")), on="entity", how="full",
                                  coalesce=True)
        moved = before.filter(pl.col("set").is_null() | pl.col("now").is_null() | (pl.col("set") != pl.col("now")))
        changed = moved.height
        # both sorted by entity, apart: merged, not sorted again (a sort of every member costs
        # memory and time at any batch size); live sets by a mask over the ids
        members = kept.merge_sorted(now.select("entity", "set").sort("entity"), key="entity")
        mask = np.zeros(previous.next_set + made.height, dtype=bool)
        mask[members["set"].to_numpy()] = True
        live = pl.DataFrame({"set": np.flatnonzero(mask).astype(np.int64)})
        del mask
        sets_table = pl.concat([known.join(live, on="set", how="semi"), made.select(SET_SCHEMA.keys())])
        forgotten = known.height - (sets_table.height - made.height)
        next_set = previous.next_set + made.height
    new_files: list[StoredFile] = []
    bucket_files = list(previous.bucket_files)
    candidates = pl.DataFrame(schema={"left": pl.Int64, "right": pl.Int64, "bands_shared": pl.Int32})
    if made.height:
        with clock("sign_and_band"):
            columns = comparable_by_position(sets, made["id"].to_numpy(), params, plan["bands"] * plan["rows"])
            wide = band_engine.keys(columns, made["set"].to_numpy(), plan["bands"], plan["rows"])
            del columns
            relative = f"{STATE}/{run_id}.{buckets.SUFFIX}"
            new_files.append(buckets.write_wide(store, relative, wide, plan["bands"], run_id))
            bucket_files.append(relative)
            if previous.next_set != 0:  # the new sets' buckets
                found = [np.unique(wide[str(b)].to_numpy()) for b in range(plan["bands"])]
            del wide
        with clock("join"):
            if previous.next_set == 0:  # a build from nothing: every set is new, pairs from the runs of keys
                candidates, largest = buckets.all_pairs(store / relative, plan["max_bucket"])
            else:
                candidates, largest = _join_new(store, bucket_files, found, live, previous.next_set, next_set)
            if largest > plan["max_bucket"]:
                raise Oversize(f"a bucket would hold {largest} sets, over --max-bucket {plan['max_bucket']}")
    with clock("verify"):
        verified, extra_sets = _verify(store, folded, candidates, members, params, plan["threshold"],
                                       verify_engine, work, sets if touched is None else None,
                                       extra(members) if extra is not None else None)
        alive = previous.pairs.join(live, left_on="left", right_on="set", how="semi").join(
            live, left_on="right", right_on="set", how="semi")
        pairs = pl.concat([alive, verified]) if touched is not None else verified
        gone = previous.pairs.join(alive.select("left", "right"), on=["left", "right"], how="anti")
        pair_sets = pl.concat([gone["left"], gone["right"], verified["left"], verified["right"]]).unique()
    if len(bucket_files) > COMPACT_AFTER:
        with clock("compact"):
            relative = f"{STATE}/{run_id}.buckets-all.{buckets.SUFFIX}"
            new_files = [f for f in new_files if f.path not in bucket_files] + [
                buckets.compact(store, [store / f for f in bucket_files], relative, plan["bands"],
                                _live_mask(live, next_set), run_id)]
            bucket_files = [relative]
    state = IndexState(members, sets_table, pairs, bucket_files, next_set, plan)
    moved_sets = pl.concat([moved["set"], moved["now"]]).drop_nulls().unique()
    cap = plan["top_k"] + 1
    old_heads, new_heads = (heads(m, moved_sets, cap) for m in (previous.members, members))
    differ = pl.concat([old_heads.join(new_heads, on=["set", "entity"], how="anti"),
                        new_heads.join(old_heads, on=["set", "entity"], how="anti")])["set"].unique()
    return Update(state, changed, made.height, forgotten, candidates.height, verified.height, new_files,
                  moved["entity"], moved_sets, pair_sets, differ, previous.members.height, extra_sets)


def changed_between(before: IndexState, after: IndexState) -> int:
    """Entities whose set differs between two states (by fingerprint, so across set ids), or
    that are in one only."""
    def prints(state: IndexState) -> pl.DataFrame:
        return state.members.join(state.sets, on="set").select("entity", "fa", "fb")

    old, new = prints(before), prints(after)
    return pl.concat([old.join(new, on=["entity", "fa", "fb"], how="anti")["entity"],
                      new.join(old, on=["entity", "fa", "fb"], how="anti")["entity"]]).n_unique()


def heads(members: pl.DataFrame, sets: pl.Series, cap: int) -> pl.DataFrame:
    """The first ``cap`` members (key order) of each of ``sets``: all the publish stage reads
    of a group of identical sets beside its own members' lists (:func:`lshjob.index.publish.expand`)."""
    return (members.join(sets.to_frame("set"), on="set", how="semi").sort("entity")
            .group_by("set", maintain_order=True).head(cap).select("set", "entity"))


def _live_mask(live: pl.DataFrame, next_set: int) -> np.ndarray:
    mask = np.zeros(next_set, dtype=bool)
    mask[live["set"].to_numpy()] = True
    return mask


def _join_new(store: Path, files: list[str], queries: list[np.ndarray], live: pl.DataFrame, first_new: int,
              next_set: int) -> tuple[pl.DataFrame, int]:
    """Candidate pairs with a new set and the largest bucket a new set is in (``queries``: each
    band's buckets of the new sets, whose table is the last of ``files``): the live rows of
    those buckets, found by binary search in the sorted tables (:mod:`lshjob.jobs.refresh_buckets`),
    joined in memory: each new set's row with every other row of its bucket, a pair of two new sets
    once, of two old sets never, buckets of one set left out; the bands a pair shares counted."""
    rows = buckets.rows_in([store / f for f in files], queries, _live_mask(live, next_set))
    rows = rows.with_columns(size=pl.len().over("band", "bucket"))
    largest = int(rows["size"].max() or 0)
    shared = rows.filter(pl.col("size") > 1).drop("size")
    pairs = (shared.filter(pl.col("set") >= first_new)
             .join(shared, on=["band", "bucket"], suffix="_b")
             .filter((pl.col("set_b") < first_new) | (pl.col("set") < pl.col("set_b")))
             .group_by(pl.min_horizontal("set", "set_b").alias("left"),
                       pl.max_horizontal("set", "set_b").alias("right"))
             .agg(pl.len().cast(pl.Int32).alias("bands_shared")))
    return pairs.cast({"left": pl.Int64, "right": pl.Int64}), largest


def _verify(store: Path, folded: Folded, candidates: pl.DataFrame, members: pl.DataFrame,
            params: SignatureParams, threshold: float, engine, work: Path,
            held: ElementSets | None = None, extra: pl.Series | None = None
            ) -> tuple[pl.DataFrame, ElementSets | None]:
    """Exact Jaccard (and estimate) of the candidates, from the sets of one member of each,
    through the run's verify engine; the pairs reaching ``threshold``, by set id. ``held``:
    every window set, already read (a build from nothing), else the members' sets are read,
    with those of the ``extra`` entities (returned second, in key order)."""
    if candidates.height == 0 and extra is None:
        return pl.DataFrame(schema=PAIR_SCHEMA), None
    wanted = pl.concat([candidates["left"], candidates["right"]]).unique().to_frame("set")
    holder = members.join(wanted, on="set", how="semi").group_by("set").agg(pl.col("entity").min())
    if held is not None:
        sets = held
    else:
        read = holder["entity"] if extra is None else pl.concat([holder["entity"], extra]).unique()
        sets = window_sets(store, folded, read)
    extra_sets = None
    if extra is not None:
        ids = np.flatnonzero(sets.keys.is_in(extra.implode()).to_numpy())
        extra_sets = sets.subset(ids)
    if candidates.height == 0:
        return pl.DataFrame(schema=PAIR_SCHEMA), extra_sets
    local = holder.join(pl.DataFrame({"entity": sets.keys, "id": np.arange(sets.size, dtype=np.int64)}),
                        on="entity").select("set", "id")
    pairs = (candidates.join(local.rename({"set": "left", "id": "a"}), on="left")
             .join(local.rename({"set": "right", "id": "b"}), on="right")
             .select(pl.min_horizontal("a", "b").alias("left_rep"), pl.max_horizontal("a", "b").alias("right_rep"),
                     "bands_shared"))
    work.mkdir(parents=True, exist_ok=True)
    path = work / "candidates.parquet"
    pairs.write_parquet(path)
    verified = engine.verify(path, HeldSets(sets), threshold, params, VerifySettings())
    by_set = local.rename({"id": "rep"})
    verified = (verified.join(by_set.rename({"rep": "left_rep", "set": "a"}), on="left_rep")
                .join(by_set.rename({"rep": "right_rep", "set": "b"}), on="right_rep"))
    return verified.select(pl.min_horizontal("a", "b").alias("left"), pl.max_horizontal("a", "b").alias("right"),
                           "jaccard", "estimate", pl.col("bands_shared").cast(pl.Int32)), extra_sets


def compose_signatures(tables: list[pl.DataFrame]) -> pl.DataFrame:
    """The window signature of each entity: the element-wise minimum of its period
    signatures (``entity``, ``signature``), raw (oph keeps its empty bins; densify after)."""
    rows = pl.concat([t.select("entity", "signature") for t in tables])
    exploded = rows.with_columns(position=pl.int_ranges(pl.col("signature").list.len())).explode(
        "signature", "position")
    return (exploded.group_by("entity", "position").agg(pl.col("signature").min())
            .sort("entity", "position").group_by("entity", maintain_order=True).agg("signature"))


def published_inputs(members: pl.DataFrame, pairs: pl.DataFrame) -> tuple[pl.Series, np.ndarray, pl.DataFrame]:
    """What the publish stage takes, as the run makes it, from members (entity, set; sorted by
    entity) and pairs of sets: the entity keys (id = position, key order), each entity's
    representative (the smallest id of its set) and the verified pairs of representatives."""
    members = members.with_row_index("id").with_columns(pl.col("id").cast(pl.Int64))
    rep = members.group_by("set").agg(pl.col("id").min().alias("rep"))
    rep_of = members.join(rep, on="set", how="left", maintain_order="left")["rep"].to_numpy()
    verified = (pairs.join(rep.rename({"set": "left", "rep": "a"}), on="left")
                .join(rep.rename({"set": "right", "rep": "b"}), on="right")
                .select(pl.min_horizontal("a", "b").alias("left_rep"), pl.max_horizontal("a", "b").alias("right_rep"),
                        "jaccard", "estimate", "bands_shared"))
    return members["entity"], np.ascontiguousarray(rep_of, dtype=np.int64), verified
