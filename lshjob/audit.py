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

from .errors import ParameterError
from .identical import collapse_identical
from .ingest import EventSpec
from .loading import load_membership
from .membership import Membership
from .planner import candidate_probability
from .publish import NEIGHBOURS, read_manifest
from .similarity import overlap_counts, postings_of, restricted_index, visit_costs
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


def _distinct_set_pairs(sets: Membership, truth: pl.DataFrame, published: pl.DataFrame, plan: dict) -> dict:
    """Recall over distinct pairs of different sets. Entities with identical sets share one
    outcome (they are banded as one), so per-entity recall can swing with a single pair of
    sets; over distinct set pairs the outcomes are independent and the S-curve prediction
    comes with a binomial standard error sqrt(p(1-p)/n)."""
    rep_of, _ = collapse_identical(sets)
    hit = truth.join(published.select("a", "b", pl.lit(True).alias("hit")), on=["a", "b"], how="left")
    pairs = hit.with_columns(
        ra=pl.Series(rep_of[truth["a"].to_numpy()]), rb=pl.Series(rep_of[truth["b"].to_numpy()])
    ).filter(pl.col("ra") != pl.col("rb"))
    groups = pairs.group_by(pl.min_horizontal("ra", "rb").alias("x"), pl.max_horizontal("ra", "rb").alias("y")).agg(
        pl.col("hit").fill_null(False).any(), pl.first("jaccard")
    )
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


def audit_index(index_dir, events=None, sample: int = 200, seed: int = 0) -> dict:
    """Recall and correctness of the index in ``index_dir`` on ``sample`` random entities."""
    if sample < 1:
        raise ParameterError(f"--sample must be at least 1; got {sample}")
    manifest = read_manifest(index_dir)
    spec = EventSpec(**manifest["spec"])
    threshold = manifest["options"]["threshold"]
    top_k = manifest["options"]["top_k"]
    plan = manifest["plan"]
    source = events if events is not None else manifest["inputs"]["source"]
    sets, _ = load_membership(source, spec)
    rng = np.random.default_rng(seed)
    picked = np.sort(rng.choice(sets.size, size=min(sample, sets.size), replace=False))
    offsets, dense, n_ids = restricted_index(sets, sets.subset(picked).elements)
    starts, members = postings_of(offsets, dense, n_ids)
    work = float(visit_costs(offsets, dense, starts)[picked].sum())
    allowed = np.ones(sets.size, dtype=np.bool_)
    scope = "all entities"
    if work > MAX_BRUTE_FORCE_WORK:
        allowed[:] = False
        allowed[picked] = True
        scope = f"the {len(picked)} sampled entities only (comparing against all would visit {work:.3g} postings)"
    a, b, jac = _neighbours_above(offsets, dense, starts, members, sets.set_sizes, picked, allowed, threshold)
    truth = pl.DataFrame({"a": a, "b": b, "jaccard": jac})

    index = pl.read_parquet(f"{index_dir}/{NEIGHBOURS}")
    key_to_id = pl.DataFrame({"key": sets.keys, "id": np.arange(sets.size, dtype=np.int64)})
    published = (
        index.filter(pl.col("entity").is_in(sets.keys.gather(picked).implode()))
        .join(key_to_id.rename({"key": "entity", "id": "a"}), on="entity")
        .join(key_to_id.rename({"key": "neighbour", "id": "b"}), on="neighbour")
    )
    if scope != "all entities":
        published = published.filter(pl.col("b").is_in(pl.Series(picked).implode()))
    exact = exact_jaccard(sets.offsets, sets.elements, published["a"].to_numpy(), published["b"].to_numpy())
    published = published.with_columns(pl.Series("exact", exact))
    wrong = published.filter(((pl.col("jaccard") - pl.col("exact")).abs() > 1e-12) | (pl.col("exact") < threshold))

    per_entity = truth.group_by("a").agg(pl.len().alias("true"))
    found = published.join(truth, on=["a", "b"], how="semi").group_by("a").agg(pl.len().alias("found"))
    tally = per_entity.join(found, on="a", how="left").with_columns(
        pl.col("found").fill_null(0), pl.min_horizontal(pl.col("true"), pl.lit(top_k)).alias("expected")
    )
    expected = int(tally["expected"].sum())
    measured = float(tally["found"].sum() / expected) if expected else None

    if plan["mode"] == "identical-only" or truth.height == 0:
        predicted = None if truth.height == 0 else 1.0
    else:
        p = candidate_probability(jac, plan["bands"], plan["rows"])
        p[jac >= 1.0] = 1.0  # identical sets are grouped exactly, whatever the bands
        predicted = float(p.mean())
    distinct = _distinct_set_pairs(sets, truth, published, plan)
    return {
        "index": str(index_dir),
        "events": str(source),
        "threshold": threshold,
        "top_k": top_k,
        "plan": {k: plan.get(k) for k in ("mode", "perms", "bands", "rows")},
        "sampled_entities": int(len(picked)),
        "compared_against": scope,
        "true_pairs": truth.height,
        "expected_in_index": expected,
        "found": int(tally["found"].sum()),
        "recall": measured,
        "predicted_recall": predicted,
        **distinct,
        "published_pairs_checked": published.height,
        "wrong_pairs": wrong.height,
        "wrong_examples": wrong.head(5).select("entity", "neighbour", "jaccard", "exact").rows(),
    }
