"""Audit a published index against exact brute force on a sample of entities.

For M sampled entities, every other entity's exact Jaccard is computed through an inverted
index (element -> entities), so the truth is exact, not estimated. The report gives the
index's recall on those entities as the index promises it (each entity's true top-k
neighbours at or above the threshold, ties at the k-th value honoured), the recall the
S-curve predicts for the same neighbours, and every published pair whose stored Jaccard is
wrong or below the threshold.

Before that it checks that ``neighbours.parquet`` is the file the manifest describes (its
sha256) and compares the events with the run's input (the manifest's digest): a different
index file is a failed check, different events a warning.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.contracts.manifest import Manifest
from lshjob.core._jit import numba
from lshjob.core.atomic import file_sha256
from lshjob.core.digest import digest_in_background
from lshjob.core.sets import ElementSets
from lshjob.errors import InputError, ParameterError
from lshjob.index.collapse import fingerprints
from lshjob.index.publish import MANIFEST, NEIGHBOURS, read_manifest
from lshjob.index.verify import exact_jaccard
from lshjob.ingest.loading import entity_counts, event_bytes, grouping_need, membership_of, open_events
from lshjob.ingest.spec import EventSpec, resolve_paths
from lshjob.plan.banding import candidate_probability
from lshjob.plan.choose import Plan
from lshjob.plan.similarity import overlap_counts, postings_of, restricted_index, visit_costs
from lshjob.runtime import budget
from lshjob.runtime.budget import Budget, default_memory, peak_bytes
from lshjob.runtime.partitions import entities_of, key_ranges
from lshjob.runtime.remote import fetch_index, is_uri, local_or_none

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
                parts: int | None = None, min_recall: float | None = None) -> dict:
    """Recall and correctness of the index in ``index_dir`` on ``sample`` random entities.

    The report's ``failed`` lists the checks that failed (a published pair whose stored
    Jaccard is wrong, recall below ``min_recall``, or a ``neighbours.parquet`` other than
    the one the manifest describes, after which nothing is measured); ``warnings`` what the
    figures should be read with (events other than the run's input).

    When the sets need more than half of ``memory`` (bytes; default half the machine), or
    ``parts`` > 1, the other entities are read a key range at a time (:mod:`lshjob.runtime.partitions`):
    the sampled sets are appended to each part's and compared there, so every pair is seen
    once, in the part of its other entity."""
    if sample < 1:
        raise ParameterError(f"--sample must be at least 1; got {sample}")
    if min_recall is not None and not 0.0 <= min_recall <= 1.0:
        raise ParameterError(f"--min-recall must be in [0, 1]; got {min_recall}")
    if is_uri(index_dir):
        return _audit_uri(str(index_dir), events, sample, seed, memory, parts, min_recall)
    manifest = read_manifest(index_dir)
    neighbours = Path(index_dir) / NEIGHBOURS
    if not neighbours.is_file():
        raise InputError(f"{neighbours}: no such file; the index folder holds a manifest but no neighbour table")
    source = events if events is not None else manifest.inputs["source"]
    source = local_or_none(source) or source  # a Spark run's file:// input is a path here
    if events is None:
        _recorded_input_exists(source)
    warnings: list[str] = []
    input_digest = _events_digest(source, manifest)  # in a thread, while the index file is hashed and the sets read
    integrity = _check_index_file(neighbours, manifest, warnings)
    if integrity is not None:
        return {"index": str(index_dir), "events": str(source), "audited": False, "failed": [integrity],
                "warnings": warnings, "min_recall": min_recall, "recall": None}
    spec = EventSpec(**manifest.spec)
    threshold = manifest.options["threshold"]
    top_k = manifest.options["top_k"]
    plan = Plan.from_manifest({"plan": manifest.plan, "options": manifest.options})
    opened = open_events(source, spec)
    memory = memory or default_memory()
    rng = np.random.default_rng(seed)
    if Budget(memory, parts).one_part(grouping_need(opened)):
        whole, _ = membership_of(opened, None)
        sampled = whole.subset(np.sort(rng.choice(whole.size, size=min(sample, whole.size), replace=False)))
        blocks = iter([whole])
        n_blocks = 1
    else:
        counts = entity_counts(opened)
        picked = np.sort(rng.choice(counts.height, size=min(sample, counts.height), replace=False))
        sampled, _ = membership_of(opened, entities_of(counts, picked))
        # the part and a copy of it with the sample appended: a quarter of the free budget each
        ranges = key_ranges(counts, Budget(memory).range_bytes(counts.height, budget.AUDIT_PART_SHARE), parts,
                            event_bytes=event_bytes(opened))
        blocks = (membership_of(opened, r)[0] for r in ranges)
        n_blocks = len(ranges)
    index = pl.read_parquet(neighbours)
    published = index.filter(pl.col("entity").is_in(sampled.keys.implode()))
    truth, checked, scope = _compare(blocks, n_blocks, sampled, published, threshold)
    wrong = checked.filter(((pl.col("jaccard") - pl.col("exact")).abs() > 1e-12) | (pl.col("exact") < threshold))
    figures = top_k_recall(truth, checked, top_k, plan)
    _compare_events(input_digest, source, manifest, warnings)
    failed = []
    if wrong.height:
        failed.append(f"{wrong.height} published pair(s) have a wrong Jaccard or one below the threshold {threshold}")
    if min_recall is not None and figures["recall"] is None:
        failed.append(f"recall could not be measured (no true pair among the {sampled.size} sampled entities); "
                      f"--min-recall {min_recall} needs one")
    elif min_recall is not None and figures["recall"] < min_recall:
        failed.append(f"recall {figures['recall']:.4f} measured on {sampled.size} sampled entities is below "
                      f"--min-recall {min_recall}")
    return {
        "index": str(index_dir),
        "events": str(source),
        "audited": True,
        "threshold": threshold,
        "top_k": top_k,
        "plan": {"mode": str(plan.mode), "perms": plan.perms, "bands": plan.bands, "rows": plan.rows},
        "sampled_entities": int(sampled.size),
        "compared_against": scope,
        "parts": n_blocks,
        "true_pairs": truth.height,
        **figures,
        "min_recall": min_recall,
        "published_pairs_checked": checked.height,
        "wrong_pairs": wrong.height,
        "wrong_examples": wrong.head(5).select("entity", "neighbour", "jaccard", "exact").rows(),
        "failed": failed,
        "warnings": warnings,
        "peak_memory_bytes": peak_bytes(),
    }


def _audit_uri(given: str, events, sample, seed, memory, parts, min_recall) -> dict:
    """The audit of an index folder named by a URI: a ``file://`` one where it is, any other
    copied here first (the manifest, then the neighbours file: :func:`lshjob.runtime.remote.fetch_index`);
    the report names the URI."""
    local = local_or_none(given)
    if local is not None:
        return audit_index(local, events, sample, seed, memory, parts, min_recall)
    with tempfile.TemporaryDirectory(prefix="lshjob-audit-") as held:
        fetch_index(given, Path(held), (MANIFEST, NEIGHBOURS))
        report = audit_index(held, events, sample, seed, memory, parts, min_recall)
    named = given.split("?", 1)[0].rstrip("/")
    report["index"] = named
    for entry in ("failed", "warnings"):
        report[entry] = [line.replace(held, named) for line in report[entry]]
    return report


def _recorded_input_exists(source) -> None:
    """Refuse, with the way out, a run's recorded input that is gone (moved or deleted)."""
    try:
        resolve_paths(source)
    except InputError as exc:
        raise InputError(f"{exc} (the run's input, as its manifest records it); pass --events to audit "
                         "against other events") from None


def _check_index_file(neighbours: Path, manifest: Manifest, warnings: list[str]) -> str | None:
    """A failed check when ``neighbours.parquet`` is not the file the manifest records."""
    recorded = (manifest.output or {}).get("sha256")
    if recorded is None:
        warnings.append(f"{neighbours}: the manifest records no sha256 of it; the file was not checked")
        return None
    actual = file_sha256(neighbours)
    if actual != recorded:
        return (f"{neighbours}: sha256 {actual} differs from the manifest's {recorded}: the file is not the "
                "one the run published; nothing measured")
    return None


def _events_digest(source, manifest: Manifest):
    """The digest of the events, as the run computed it for its input (bytes and order only,
    so the same files read by another path compare equal); computed in a thread while the
    audit reads them. None when there is nothing to compare with."""
    if not manifest.inputs.get("sha256"):
        return None
    return digest_in_background([str(p) for p in resolve_paths(source)[0]])


def _compare_events(digest, source, manifest: Manifest, warnings: list[str]) -> None:
    if digest is None:
        warnings.append(f"{source}: the manifest records no digest of the run's input; the events were not compared")
        return
    (size, sha), _ = digest.result()
    inputs = manifest.inputs
    if sha != inputs["sha256"]:
        warnings.append(f"{source}: these events differ from the run's input {inputs.get('source')} (sha256 "
                        f"{sha[:16]}... of {size:,} bytes; the manifest records {inputs['sha256'][:16]}... of "
                        f"{inputs.get('bytes', 0):,}); recall is measured against these events")


def _compare(blocks, n_blocks: int, sampled: ElementSets, published: pl.DataFrame,
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


def _append(first: ElementSets, second: ElementSets) -> ElementSets:
    """The sets of ``first`` then those of ``second``, as one table (element codes agree: both
    come from one reading of the events)."""
    offsets = np.concatenate([first.offsets, second.offsets[1:] + first.offsets[-1]])
    return ElementSets(pl.concat([first.keys, second.keys]), offsets,
                      np.concatenate([first.elements, second.elements]), first.text_hashes)


def top_k_recall(truth: pl.DataFrame, checked: pl.DataFrame, top_k: int, plan: Plan) -> dict:
    """Recall as the index promises it: of each sampled entity's true top-k neighbours at or
    above the threshold, the share published.

    An entity with n true neighbours expects min(n, k) of them. When more than k true
    neighbours exist and several tie at the k-th value v, the neighbours above v count
    one by one and those at v fill the places left after them: found = published above v +
    min(published at v, places left). Which tied neighbours the index kept, and neighbours
    below the cut that it did not keep, are then never misses. The S-curve predicts each
    place's chance of being filled: P(found) for a neighbour above v, and for the t tied
    ones sharing s places E[min(X, s)] with X ~ Binomial(t, P(v)) (their pairs taken as
    independent). Over distinct pairs of different sets, only neighbours that fit in top-k
    whatever the ties (at most k true neighbours at or above their value) are counted."""
    ranked = truth.with_columns(
        at_least=pl.col("jaccard").rank("max", descending=True).over("a"),  # true neighbours at >= this value
        greater=pl.col("jaccard").rank("min", descending=True).over("a") - 1,  # ... strictly above it
    ).with_columns(inside=pl.col("at_least") <= top_k,
                   straddles=(pl.col("at_least") > top_k) & (pl.col("greater") < top_k))
    published = checked.select(pl.col("entity").alias("a"), pl.col("neighbour").alias("b"), pl.lit(True).alias("hit"))
    ranked = ranked.join(published, on=["a", "b"], how="left").with_columns(pl.col("hit").fill_null(False))
    jac = ranked["jaccard"].to_numpy()
    if not plan.banded:
        p = np.ones(len(jac))
    else:
        p = candidate_probability(jac, plan.bands, plan.rows)
        p[jac >= 1.0] = 1.0  # identical sets are grouped exactly, whatever the bands
    ranked = ranked.with_columns(pl.Series("p", p, dtype=pl.Float64))
    per_entity = ranked.group_by("a").agg(
        inside=pl.col("inside").sum(), found_inside=(pl.col("inside") & pl.col("hit")).sum(),
        predicted_inside=pl.col("p").filter(pl.col("inside")).sum(), ties=pl.col("straddles").sum(),
        found_ties=(pl.col("straddles") & pl.col("hit")).sum(), p_tie=pl.col("p").filter(pl.col("straddles")).first(),
    ).sort("a").with_columns(places=pl.when(pl.col("ties") > 0).then(top_k - pl.col("inside")).otherwise(0))
    expected = int(per_entity["inside"].sum() + per_entity["places"].sum())
    found = int(per_entity["found_inside"].sum()
                + per_entity.select(pl.min_horizontal("found_ties", "places")).to_series().sum())
    tied = per_entity.filter(pl.col("ties") > 0)
    predicted = float(per_entity["predicted_inside"].sum()) + sum(
        _expected_filled(t, s, q) for t, s, q in zip(tied["ties"], tied["places"], tied["p_tie"]))
    return {
        "expected_in_index": expected,
        "found": found,
        "recall": found / expected if expected else None,
        "predicted_recall": predicted / expected if expected else None,
        "entities_tied_at_top_k": tied.height,
        **_distinct_set_pairs(ranked.filter("inside"), plan),
    }


def _expected_filled(ties: int, places: int, p: float) -> float:
    """E[min(X, places)] for X ~ Binomial(ties, p): the sum over j < places of P(X > j)."""
    if p <= 0.0:
        return 0.0
    if p >= 1.0:
        return float(min(ties, places))
    log_p, log_q = math.log(p), math.log1p(-p)
    below = 0.0  # P(X <= j)
    total = 0.0
    for j in range(places):
        below += math.exp(math.lgamma(ties + 1) - math.lgamma(j + 1) - math.lgamma(ties - j + 1)
                          + j * log_p + (ties - j) * log_q)
        total += max(0.0, 1.0 - below)
    return total


def _distinct_set_pairs(hit: pl.DataFrame, plan: Plan) -> dict:
    """Recall over distinct pairs of different sets. Entities with identical sets share one
    outcome (they are banded as one), so per-entity recall can swing with a single pair of
    sets; over distinct set pairs the outcomes are independent and the S-curve prediction
    comes with a binomial standard error sqrt(p(1-p)/n). A set is known by its 128-bit
    fingerprint (:mod:`lshjob.index.collapse`). ``hit``: the true pairs counted, each with
    ``hit`` (published)."""
    first_lower = ((pl.col("fa_a") < pl.col("fa_b"))
                   | ((pl.col("fa_a") == pl.col("fa_b")) & (pl.col("fb_a") < pl.col("fb_b"))))
    pairs = hit.filter((pl.col("fa_a") != pl.col("fa_b")) | (pl.col("fb_a") != pl.col("fb_b"))).with_columns(
        x_a=pl.when(first_lower).then("fa_a").otherwise("fa_b"),
        x_b=pl.when(first_lower).then("fb_a").otherwise("fb_b"),
        y_a=pl.when(first_lower).then("fa_b").otherwise("fa_a"),
        y_b=pl.when(first_lower).then("fb_b").otherwise("fb_a"),
    )
    groups = (pairs.group_by("x_a", "x_b", "y_a", "y_b").agg(pl.col("hit").any(), pl.first("jaccard"))
              .sort("x_a", "x_b", "y_a", "y_b"))  # sums in one order, however the pairs were found
    n = groups.height
    if n == 0 or not plan.banded:
        return {"distinct_set_pairs": n, "distinct_recall": None, "distinct_predicted": None, "distinct_se": None}
    p = float(candidate_probability(groups["jaccard"].to_numpy(), plan.bands, plan.rows).mean())
    return {
        "distinct_set_pairs": n,
        "distinct_recall": float(groups["hit"].mean()),
        "distinct_predicted": p,
        "distinct_se": float(np.sqrt(p * (1 - p) / n)),
    }
