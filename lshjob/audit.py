"""Audit a published index against exact brute force on a sample of entities.

For M sampled entities, every other entity's exact Jaccard is computed through an inverted
index (element -> entities), so the truth is exact, not estimated. The report gives the
index's recall on those entities (limited to top-k, as the index is), the recall the
S-curve predicts for the similarities actually seen, and every published pair whose stored
Jaccard is wrong or below the threshold.
"""

from __future__ import annotations

import numba
import numpy as np
import polars as pl

from . import parts as parts_module
from .errors import ParameterError
from .identical import fingerprints
from .ingest import EventSpec
from .loading import grouping_need, membership_of, open_events
from .membership import Membership
from .planner import candidate_probability
from .publish import NEIGHBOURS, read_manifest
from .similarity import overlap_counts, postings_of, restricted_index, visit_costs
from .resources import default_memory, peak_bytes
from .verify import exact_jaccard

MAX_BRUTE_FORCE_WORK = 5e9  # posting visits; beyond this the audit compares within the sample


@numba.njit(cache=True)
def _neighbours_above(offsets, elements, starts, members, sizes, sample, allowed, threshold):
    n = offsets.shape[0] - 1
    inter = np.zeros(n, dtype=np.int32)
    touched = np.empty(n, dtype=np.int64)
    out_a = []
    out_b = []
    out_j = []
    for a in sample:
        nt = overlap_counts(offsets, elements, starts, members, a, allowed, inter, touched)
        size_a = sizes[a]
        for q in range(nt):
            b = touched[q]
            jac = inter[b] / (size_a + sizes[b] - inter[b])
            if jac >= threshold:
                out_a.append(a)
                out_b.append(b)
                out_j.append(jac)
            inter[b] = 0
    return np.array(out_a, dtype=np.int64), np.array(out_b, dtype=np.int64), np.array(out_j, dtype=np.float64)


def audit_index(index_dir, events=None, sample: int = 200, seed: int = 0, memory: int | None = None,
                parts: int | None = None) -> dict:
    """Recall and correctness of the index in ``index_dir`` on ``sample`` random entities.

    When the sets need more than half of ``memory`` (bytes; default half the machine), or
    ``parts`` > 1, the other entities are read a key range at a time (:mod:`lshjob.parts`):
    the sampled sets are appended to each part's and compared there, so every pair is seen
    once, in the part of its other entity."""
    if sample < 1:
        raise ParameterError(f"--sample must be at least 1; got {sample}")
    manifest = read_manifest(index_dir)
    spec = EventSpec(**manifest["spec"])
    threshold = manifest["options"]["threshold"]
    top_k = manifest["options"]["top_k"]
    plan = manifest["plan"]
    source = events if events is not None else manifest["inputs"]["source"]
    opened = open_events(source, spec)
    memory = memory or default_memory()
    rng = np.random.default_rng(seed)
    if parts == 1 or (parts is None and grouping_need(opened) <= parts_module.ONE_PART_SHARE * memory):
        whole, _ = membership_of(opened, None)
        sampled = whole.subset(np.sort(rng.choice(whole.size, size=min(sample, whole.size), replace=False)))
        blocks = iter([whole])
        n_blocks = 1
    else:
        counts = parts_module.events_per_entity(opened)
        picked = np.sort(rng.choice(counts.height, size=min(sample, counts.height), replace=False))
        sampled, _ = membership_of(opened, parts_module.entities_of(counts, picked))
        # the part and a copy of it with the sample appended: a quarter of the free budget each
        ranges = parts_module.key_ranges(counts, opened, parts_module.part_budget(memory, counts.height, 0.25), parts)
        blocks = (membership_of(opened, r)[0] for r in ranges)
        n_blocks = len(ranges)
    index = pl.read_parquet(f"{index_dir}/{NEIGHBOURS}")
    published = index.filter(pl.col("entity").is_in(sampled.keys.implode()))
    truth, checked, scope = _compare(blocks, n_blocks, sampled, published, threshold)
    wrong = checked.filter(((pl.col("jaccard") - pl.col("exact")).abs() > 1e-12) | (pl.col("exact") < threshold))

    per_entity = truth.group_by("a").agg(pl.len().alias("true"))
    found = (checked.rename({"entity": "a", "neighbour": "b"}).join(truth, on=["a", "b"], how="semi")
             .group_by("a").agg(pl.len().alias("found")))
    tally = per_entity.join(found, on="a", how="left").with_columns(
        pl.col("found").fill_null(0), pl.min_horizontal(pl.col("true"), pl.lit(top_k)).alias("expected")
    )
    expected = int(tally["expected"].sum())
    measured = float(tally["found"].sum() / expected) if expected else None

    jac = truth["jaccard"].to_numpy()
    if plan["mode"] == "identical-only" or truth.height == 0:
        predicted = None if truth.height == 0 else 1.0
    else:
        p = candidate_probability(jac, plan["bands"], plan["rows"])
        p[jac >= 1.0] = 1.0  # identical sets are grouped exactly, whatever the bands
        predicted = float(p.mean())
    distinct = _distinct_set_pairs(truth, checked, plan)
    return {
        "index": str(index_dir),
        "events": str(source),
        "threshold": threshold,
        "top_k": top_k,
        "plan": {k: plan.get(k) for k in ("mode", "perms", "bands", "rows")},
        "sampled_entities": int(sampled.size),
        "compared_against": scope,
        "parts": n_blocks,
        "true_pairs": truth.height,
        "expected_in_index": expected,
        "found": int(tally["found"].sum()),
        "recall": measured,
        "predicted_recall": predicted,
        **distinct,
        "published_pairs_checked": checked.height,
        "wrong_pairs": wrong.height,
        "wrong_examples": wrong.head(5).select("entity", "neighbour", "jaccard", "exact").rows(),
        "peak_memory_bytes": peak_bytes(),
    }


def _compare(blocks, n_blocks: int, sampled: Membership, published: pl.DataFrame,
             threshold: float) -> tuple[pl.DataFrame, pl.DataFrame, str]:
    """Exact truth for the sampled entities against the entities of each block of sets, and
    the exact Jaccard of each published pair of a sampled entity.

    Returns (truth: ``a``, ``b`` keys, ``jaccard``, the fingerprints ``fa_a, fb_a, fa_b,
    fb_b`` of both sets; published rows with ``exact``; the scope of the comparison)."""
    truths, checks = [], []
    scope = "all entities"
    sample_fa, sample_fb = fingerprints(sampled)
    for number, block in enumerate(blocks):
        both = _append(block, sampled)
        local = block.size + np.arange(sampled.size, dtype=np.int64)
        offsets, dense, n_ids = restricted_index(both, sampled.elements)
        starts, members = postings_of(offsets, dense, n_ids)
        allowed = np.ones(both.size, dtype=np.bool_)
        allowed[block.size:] = False  # the appended copies: each pair is found in its other entity's block
        if number == 0:
            work = float(visit_costs(offsets, dense, starts)[local].sum()) * n_blocks
            if work > MAX_BRUTE_FORCE_WORK:
                scope = (f"the {sampled.size} sampled entities only (comparing against all would visit "
                         f"{work:.3g} postings)")
        if scope != "all entities":
            allowed[: block.size] = block.keys.is_in(sampled.keys.implode()).to_numpy()
        a, b, jac = _neighbours_above(offsets, dense, starts, members, both.set_sizes, local, allowed, threshold)
        fa, fb = fingerprints(block)
        keys_a = sampled.keys.gather(a - block.size)
        keys_b = block.keys.gather(b)
        truth = pl.DataFrame({"a": keys_a, "b": keys_b, "jaccard": jac,
                              "fa_a": sample_fa[a - block.size], "fb_a": sample_fb[a - block.size],
                              "fa_b": fa[b], "fb_b": fb[b]})
        truths.append(truth.filter(pl.col("a") != pl.col("b")))  # a sampled entity's own set in its block
        ids = pl.DataFrame({"key": block.keys, "id": np.arange(block.size, dtype=np.int64)})
        sample_ids = pl.DataFrame({"key": sampled.keys, "id": local})
        rows = (published.join(sample_ids.rename({"key": "entity", "id": "sa"}), on="entity")
                .join(ids.rename({"key": "neighbour", "id": "nb"}), on="neighbour"))
        exact = exact_jaccard(both.offsets, both.elements, rows["sa"].to_numpy(), rows["nb"].to_numpy())
        checks.append(rows.drop("sa", "nb").with_columns(pl.Series("exact", exact)))
        del both, block
    return pl.concat(truths).sort("a", "b"), pl.concat(checks), scope


def _append(first: Membership, second: Membership) -> Membership:
    """The sets of ``first`` then those of ``second``, as one table (element codes agree: both
    come from one reading of the events)."""
    offsets = np.concatenate([first.offsets, second.offsets[1:] + first.offsets[-1]])
    return Membership(pl.concat([first.keys, second.keys]), offsets,
                      np.concatenate([first.elements, second.elements]), first.text_hashes)


def _distinct_set_pairs(truth: pl.DataFrame, checked: pl.DataFrame, plan: dict) -> dict:
    """Recall over distinct pairs of different sets. Entities with identical sets share one
    outcome (they are banded as one), so per-entity recall can swing with a single pair of
    sets; over distinct set pairs the outcomes are independent and the S-curve prediction
    comes with a binomial standard error sqrt(p(1-p)/n). A set is known by its 128-bit
    fingerprint (:mod:`lshjob.identical`)."""
    hit = truth.join(checked.select(pl.col("entity").alias("a"), pl.col("neighbour").alias("b"),
                                    pl.lit(True).alias("hit")), on=["a", "b"], how="left")
    first_lower = (pl.col("fa_a") < pl.col("fa_b")) | ((pl.col("fa_a") == pl.col("fa_b")) & (pl.col("fb_a") < pl.col("fb_b")))
    pairs = hit.filter((pl.col("fa_a") != pl.col("fa_b")) | (pl.col("fb_a") != pl.col("fb_b"))).with_columns(
        x_a=pl.when(first_lower).then("fa_a").otherwise("fa_b"), x_b=pl.when(first_lower).then("fb_a").otherwise("fb_b"),
        y_a=pl.when(first_lower).then("fa_b").otherwise("fa_a"), y_b=pl.when(first_lower).then("fb_b").otherwise("fb_a"),
    )
    groups = (pairs.group_by("x_a", "x_b", "y_a", "y_b").agg(pl.col("hit").fill_null(False).any(), pl.first("jaccard"))
              .sort("x_a", "x_b", "y_a", "y_b"))  # sums in one order, however the pairs were found
    n = groups.height
    if n == 0 or plan["mode"] == "identical-only":
        return {"distinct_set_pairs": n, "distinct_recall": None, "distinct_predicted": None, "distinct_se": None}
    p = float(candidate_probability(groups["jaccard"].to_numpy(), plan["bands"], plan["rows"]).mean())
    return {
        "distinct_set_pairs": n,
        "distinct_recall": float(groups["hit"].mean()),
        "distinct_predicted": p,
        "distinct_se": float(np.sqrt(p * (1 - p) / n)),
    }
