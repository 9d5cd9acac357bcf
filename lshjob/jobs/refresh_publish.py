"""Publishing a refresh's index from the store's state, and its diff against the last version
(for :mod:`lshjob.jobs.refresh_paths`).

An entity's list (its top-k, :mod:`lshjob.index.publish`) is a function of its set, the first
top_k + 1 members (key order) of its set's group, the verified pairs of its set and the
first top_k + 1 members of each partner set. After an update
(:func:`lshjob.jobs.refresh_index.update`) it can differ only for the entities that moved
(their set changed, or they came) and the members of the *affected* sets: the sets of a pair
verified or forgotten, the sets whose first members changed and their partners. Those lists
are made by the run's publish stage on a sub-problem holding every member of the affected
sets and of the moved entities' sets, the first top_k + 1 members of their partners, and
their pairs; every other entity's rows are copied from the last version (whose state this
update started from). A first build publishes everything.

The diff against the last version (:func:`lshjob.jobs.diff.diff_indexes`' summary) is made
alike: rows of unaffected entities are the same in both versions, so pairs and lists change
only among rows with an affected entity on either side; the totals come from the state's
record of the last version (pairs and entities it lists).
"""

from __future__ import annotations

import polars as pl

from lshjob.index import publish
from lshjob.jobs import refresh_index as index_state
from lshjob.jobs.diff import TOP_ENTITIES, entity_changes, unordered_pairs
from lshjob.runtime.budget import current_bytes, release_freed


def affected(upd: index_state.Update, top_k: int) -> tuple[pl.Series, pl.DataFrame, pl.DataFrame]:
    """(entities whose rows may change; sets the sub-problem holds whole; sets of which it
    holds the first top_k + 1 members only). A set of more than top_k members lists only its
    own members (Jaccard 1, above any pair of different sets): its pairs change nothing."""
    pairs = upd.state.pairs.select("left", "right")
    both = pl.concat([pairs, pairs.select(pl.col("right").alias("left"), pl.col("left").alias("right"))])

    def partners(sets: pl.DataFrame) -> pl.DataFrame:
        return both.join(sets, left_on="left", right_on="set", how="semi").select(pl.col("right").alias("set"))

    head = upd.head_sets.to_frame("set")
    paired = pl.concat([upd.pair_sets.to_frame("set"), partners(head)]).unique()
    crowded = (upd.state.members.join(paired, on="set", how="semi").group_by("set").len()
               .filter(pl.col("len") > top_k).select("set"))  # of these sets only, not of every member
    paired = paired.join(crowded, on="set", how="anti")
    own = pl.concat([paired, head]).unique()
    entities = pl.concat([upd.state.members.join(own, on="set", how="semi")["entity"], upd.moved_entities]).unique()
    whole = pl.concat([own, upd.moved_sets.to_frame("set")]).unique()
    around = partners(whole).unique().join(whole, on="set", how="anti")
    return entities, whole, around


def rows_of(members: pl.DataFrame, pairs: pl.DataFrame, top_k: int, bands: int, memory: int) -> tuple[list, int]:
    """The index rows (blocks) of ``members`` with the verified ``pairs`` of sets, through the
    run's publish stage; and the rows it will hold."""
    keys, rep_of, verified = index_state.published_inputs(members, pairs)
    release_freed()
    expansion = publish.expand(verified, rep_of, top_k, bands)
    publish.check_output(expansion.published_rows, keys, top_k, memory, publish.identical_rows(rep_of, top_k)[2])
    return publish.neighbour_blocks(expansion, keys, publish.block_rows(memory, current_bytes())), keys


def changed_rows(upd: index_state.Update, previous_rows: pl.DataFrame, top_k: int, bands: int,
                 memory: int) -> tuple[pl.DataFrame, pl.Series]:
    """The new index (one table, sorted by entity and rank) from the last version's rows and
    the affected entities' new lists; and the affected entities."""
    entities, whole, around = affected(upd, top_k)
    sub_members = pl.concat([upd.state.members.join(whole, on="set", how="semi"),
                             index_state.heads(upd.state.members, around["set"], top_k + 1).select("entity", "set")]
                            ).sort("entity")
    sub_pairs = upd.state.pairs.join(whole, left_on="left", right_on="set", how="semi")
    sub_pairs = pl.concat([sub_pairs, upd.state.pairs.join(whole, left_on="right", right_on="set", how="semi")]
                          ).unique(["left", "right"])
    blocks, _ = rows_of(sub_members, sub_pairs, top_k, bands, memory)
    fresh = pl.concat(list(blocks)).filter(pl.col("entity").is_in(entities.implode()))
    kept = previous_rows.filter(~pl.col("entity").is_in(entities.implode()))
    return pl.concat([kept, fresh.cast(kept.schema)]).sort("entity", "rank"), entities


def listed_totals(rows: pl.DataFrame) -> dict:
    """What the state records of a published index for the next diff."""
    return {"published_pairs": unordered_pairs(rows.select("entity", "neighbour", "jaccard")).height,
            "published_entities": rows["entity"].n_unique()}


def restricted_diff(old_rows: pl.DataFrame, new_rows: pl.DataFrame, entities: pl.Series, totals: dict,
                    old: str, new: str) -> tuple[dict, dict]:
    """The diff summary of two versions whose rows differ only for ``entities`` (module
    docstring), and the new version's totals."""
    def near(rows):
        touched = pl.col("entity").is_in(entities.implode()) | pl.col("neighbour").is_in(entities.implode())
        return rows.filter(touched).select("entity", "neighbour", "jaccard")

    old_near, new_near = near(old_rows), near(new_rows)
    a, b = unordered_pairs(old_near), unordered_pairs(new_near)
    both = a.join(b, on=["a", "b"], how="inner", suffix="_new")
    added, removed = b.height - both.height, a.height - both.height
    untouched = totals["published_pairs"] - a.height  # the same in both versions
    either = untouched + a.height + b.height - both.height
    changes = entity_changes(old_near, new_near)

    def listed_among(rows):
        return rows.filter(pl.col("entity").is_in(entities.implode()))["entity"].unique()

    old_listed, new_listed = listed_among(old_near), listed_among(new_near)
    listed = (totals["published_entities"] - len(old_listed)) + pl.concat([old_listed, new_listed]).n_unique()
    summary = {
        "pairs_old": totals["published_pairs"], "pairs_new": untouched + b.height,
        "pairs_added": added, "pairs_removed": removed, "pairs_kept": untouched + both.height,
        "pairs_jaccard_changed": both.filter(pl.col("jaccard") != pl.col("jaccard_new")).height,
        "churn_rate": (added + removed) / either if either else 0.0,
        "entities_listed": listed, "entities_changed": changes.height,
        "entities_changed_rate": changes.height / listed if listed else 0.0,
        "most_changed": changes.head(TOP_ENTITIES).to_dicts(), "warnings": [],
    }
    new_totals = {"published_pairs": summary["pairs_new"],
                  "published_entities": totals["published_entities"] - len(old_listed) + len(new_listed)}
    return summary, new_totals
