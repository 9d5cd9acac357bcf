"""Pair-similarity distribution of a sample of entities, for data-mode planning and audits.

Exact mode counts intersections through an inverted index (element -> sampled entities):
for a sample of m entities it visits sum over elements of (postings choose 2) pairs and
returns all m(m-1)/2 Jaccard similarities. Signature mode estimates them from signatures
(fraction of equal positions), for when only a signature file is at hand.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.compile_cache import readonly
from lshjob.core.sets import ElementSets
from lshjob.errors import InputError
from lshjob.plan._postings import restricted, wanted_postings
from lshjob.plan.banding import PairHistogram
from lshjob.sign.signatures import SignatureParams, comparable, signature_array

HISTOGRAM_BINS = 1000
ENTITY_BINS = 50  # each sampled entity's own pairs, coarser: for the sizes of its buckets
LIST_BINS = 100  # each sampled entity's pairs at or above the threshold: for the recall of its top-k list


def sample_keys(keys: pl.Series, m: int, seed: int = 0) -> pl.Series:
    """A seeded uniform sample of m distinct keys (all of them when there are at most m)."""
    uniq = keys.unique().sort()
    if uniq.len() <= m:
        return uniq
    idx = np.sort(np.random.default_rng(seed).choice(uniq.len(), size=m, replace=False))
    return uniq.gather(idx)


@numba.njit(cache=True)
def postings_of(offsets, elems, n_elements):
    """Inverted index of a CSR with dense element ids: entities holding element e are
    ``members[starts[e]:starts[e+1]]``."""
    counts = np.zeros(n_elements + 1, dtype=np.int64)
    for e in elems:
        counts[e + 1] += 1
    starts = np.cumsum(counts)
    fill = starts[:-1].copy()
    members = np.empty(len(elems), dtype=np.int64)
    for a in range(len(offsets) - 1):
        for j in range(offsets[a], offsets[a + 1]):
            e = elems[j]
            members[fill[e]] = a
            fill[e] += 1
    return starts, members


@numba.njit(parallel=True, cache=True)
def _all_pairs_jaccard(offsets, elems, starts, members):
    m = len(offsets) - 1
    out = np.empty(m * (m - 1) // 2, dtype=np.float64)
    for a in numba.prange(m):
        inter = np.zeros(m, dtype=np.int64)
        for j in range(offsets[a], offsets[a + 1]):
            e = elems[j]
            for t in range(starts[e], starts[e + 1]):
                b = members[t]
                if b > a:
                    inter[b] += 1
        base = a * m - a * (a + 1) // 2
        size_a = offsets[a + 1] - offsets[a]
        for b in range(a + 1, m):
            union = size_a + offsets[b + 1] - offsets[b] - inter[b]
            out[base + b - a - 1] = inter[b] / union
    return out


@numba.njit(parallel=True, cache=True)
def _all_pairs_estimate(sig):
    m, k = sig.shape
    out = np.empty(m * (m - 1) // 2, dtype=np.float64)
    for a in numba.prange(m):
        base = a * m - a * (a + 1) // 2
        for b in range(a + 1, m):
            eq = 0
            for i in range(k):
                if sig[a, i] == sig[b, i]:
                    eq += 1
            out[base + b - a - 1] = eq / k
    return out


@numba.njit(inline="always")
def overlap_counts(offsets, elements, starts, members, a, allowed, inter, touched):
    """For entity a, add |A n B| into inter[b] for every allowed b != a sharing an element;
    list those b in touched[:returned count]. The caller resets inter for them."""
    nt = 0
    for j in range(offsets[a], offsets[a + 1]):
        e = elements[j]
        for t in range(starts[e], starts[e + 1]):
            b = members[t]
            if b == a or not allowed[b]:
                continue
            if inter[b] == 0:
                touched[nt] = b
                nt += 1
            inter[b] += 1
    return nt


@numba.njit(inline="always")
def _overlaps(offsets, elements, starts, members, s, a, inter, touched):
    """:func:`overlap_counts` with every entity allowed, for the set ``s`` of a CSR of the
    sampled sets alone (entity id ``a``): the loop that visits every posting of a sampled
    set, with one random access a visit (``inter``) instead of two."""
    nt = 0
    for j in range(offsets[s], offsets[s + 1]):
        e = elements[j]
        for t in range(starts[e], starts[e + 1]):
            b = members[t]
            if b == a:
                continue
            if inter[b] == 0:
                touched[nt] = b
                nt += 1
            inter[b] += 1
    return nt


@numba.njit(parallel=True, cache=True)
def _against_all_histogram(offsets, elements, starts, members, sizes, sample, weights, nbins, threshold, chunks):
    """``offsets``, ``elements``: the sets of ``sample`` (entity ids) alone, their elements as
    ids of the postings ``starts``, ``members`` (int32 when the ids fit: half the bytes read a
    visit); ``weights[s]``: what sample[s]'s pairs count for (1 / its chance to be visited)."""
    n = sizes.shape[0]
    counts = np.zeros((chunks, 2 * nbins), dtype=np.float64)
    sums = np.zeros((chunks, 2 * nbins), dtype=np.float64)
    identical = np.zeros(chunks, dtype=np.float64)
    per_entity = np.zeros((len(sample), ENTITY_BINS), dtype=np.float64)  # [s, bin]: pairs of sample[s]
    # [s, 0]: sample[s]'s identical sets; [s, 1 + bin]: its pairs in [threshold, 1), LIST_BINS bins
    at_or_above = np.zeros((len(sample), 1 + LIST_BINS), dtype=np.float64)
    width = (1.0 - threshold) / LIST_BINS
    for c in numba.prange(chunks):
        inter = np.zeros(n, dtype=np.int32)
        touched = np.empty(n, dtype=members.dtype)
        for s in range(c, len(sample), chunks):
            a = sample[s]
            w = weights[s]
            nt = _overlaps(offsets, elements, starts, members, s, a, inter, touched)
            size_a = sizes[a]
            for q in range(nt):
                b = touched[q]
                jac = inter[b] / (size_a + sizes[b] - inter[b])
                inter[b] = 0
                if jac >= 1.0:
                    identical[c] += w
                    at_or_above[s, 0] += 1
                else:
                    if jac >= threshold:
                        at_or_above[s, 1 + min(int((jac - threshold) / width), LIST_BINS - 1)] += 1
                    k = 2 * min(int(jac * nbins), nbins - 1) + (1 if jac >= threshold else 0)
                    counts[c, k] += w
                    sums[c, k] += w * jac
                    per_entity[s, min(int(jac * ENTITY_BINS), ENTITY_BINS - 1)] += 1
    return counts.sum(axis=0), sums.sum(axis=0), identical.sum(), per_entity, at_or_above


def visit_costs(offsets: np.ndarray, dense: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Per entity, the posting visits needed to pair it with every entity."""
    return segment_sums(np.diff(starts)[dense], offsets)


def segment_sums(values: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Sum of values[offsets[i]:offsets[i+1]] for each i (empty segments sum to 0)."""
    total = np.zeros(len(values) + 1, dtype=np.int64)
    np.cumsum(values, out=total[1:])
    return total[offsets[1:]] - total[offsets[:-1]]


def restricted_index(sets: ElementSets, wanted: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Each entity's elements that are among ``wanted`` codes, renumbered 0..len(wanted)-1:
    (offsets, dense ids, number of ids). Pairing sampled entities with all entities needs
    only the elements the sampled sets hold."""
    wanted = np.unique(np.asarray(wanted, dtype=np.int64))
    offsets, dense = restricted(sets.offsets, sets.elements, wanted)
    return offsets, dense, len(wanted)


def exact_pair_similarities(sets: pl.DataFrame) -> np.ndarray:
    """All pairwise exact Jaccard similarities among the entities of membership rows,
    pairs (i, j), i < j, in row-major order of sorted entity keys."""
    sets = ElementSets.from_sets(sets)
    if sets.size < 2:
        raise InputError(f"the sample needs at least 2 entities; got {sets.size}")
    return _within_jaccard(sets)


def _within_jaccard(sets: ElementSets) -> np.ndarray:
    uniq, dense = np.unique(sets.elements, return_inverse=True)
    dense = dense.astype(np.int64)
    starts, members = postings_of(sets.offsets, dense, len(uniq))
    return _all_pairs_jaccard(sets.offsets, dense, starts, members)


def estimated_pair_similarities(signatures: pl.DataFrame, params: SignatureParams) -> np.ndarray:
    """All pairwise signature estimates among the rows of a signature table."""
    if signatures.height < 2:
        raise InputError(f"the sample needs at least 2 entities; got {signatures.height}")
    return _all_pairs_estimate(readonly(comparable(signature_array(signatures), params)))


def histogram(
    similarities: np.ndarray, sample_entities: int, total_entities: int, threshold: float | None = None
) -> PairHistogram:
    """Bin similarities below 1 (1000 bins) keeping each bin's mean similarity; pairs of
    identical sets (similarity 1) are counted apart (see :class:`PairHistogram`). With a
    threshold, pairs on either side of it are kept in separate entries."""
    identical = similarities >= 1.0
    rest = similarities[~identical]
    side = (rest >= threshold) if threshold is not None else np.zeros(len(rest), dtype=bool)
    bins = 2 * np.minimum((rest * HISTOGRAM_BINS).astype(np.int64), HISTOGRAM_BINS - 1) + side
    counts = np.bincount(bins, minlength=2 * HISTOGRAM_BINS)
    sums = np.bincount(bins, weights=rest, minlength=2 * HISTOGRAM_BINS)
    return _make(counts, sums, sample_entities, total_entities, int(identical.sum()), "within", threshold)


def _make(counts, sums, sample_entities, total_entities, identical, design, threshold, factor=1.0):
    keep = counts > 0
    flags = (np.arange(len(counts)) % 2 == 1)[keep]
    return PairHistogram(
        similarity=sums[keep] / counts[keep],
        counts=counts[keep] * factor,
        sample_entities=sample_entities,
        total_entities=total_entities,
        identical_pairs=identical * factor,
        design=design,
        threshold=threshold,
        at_or_above=flags if threshold is not None else None,
    )


AGAINST_ALL_BUDGET = 1e8  # expected posting visits, about a second of one core
MAX_AGAINST_ALL_BUDGET = 1e9  # raised up to this while fewer than 1.5 x 200 would be visited
MIN_AGAINST_ALL = 200


def visit_chances(costs: np.ndarray, budget: float) -> np.ndarray:
    """Each sampled entity's chance to be visited so that the expected visits stay within
    ``budget``: 1 for all when they fit, else min(1, c0 / cost) with c0 such that
    sum min(cost, c0) = budget (costs proportional to size: Horvitz and Thompson, JASA 1952,
    weigh what is seen by 1 / its chance, so the estimate stays unbiased)."""
    costs = np.asarray(costs, dtype=np.float64)
    if costs.sum() <= budget:
        return np.ones(len(costs))
    ascending = np.sort(costs)
    below = np.concatenate(([0.0], np.cumsum(ascending)[:-1]))  # sum of the costs before each
    reach = below + ascending * (len(costs) - np.arange(len(costs)))  # visits were c0 = that cost
    j = int(np.searchsorted(reach, budget, "left"))
    cap = (budget - below[j]) / (len(costs) - j)
    return np.minimum(1.0, cap / np.maximum(costs, 1.0))


def sample_histogram_from_sets(
    sets: pl.DataFrame | ElementSets,
    sample: int = 2000,
    seed: int = 0,
    total_entities: int | None = None,
    threshold: float | None = None,
) -> PairHistogram:
    """Exact pair-similarity histogram of up to ``sample`` entities drawn from membership rows.

    Sampled entities are paired with every entity of the input (exact Jaccard through an
    inverted index), which sees m x N pairs instead of the m^2 within the sample: similar
    pairs are rare, and a within-sample histogram often holds too few to plan on. When the
    sample's posting visits would pass 1e8 (long-tailed data: a set holding a popular element
    visits that element's whole posting list), each sampled entity is visited with a chance
    that falls with its visits (:func:`visit_chances`, drawn with the same seed) and its pairs
    count 1 / that chance, so the histogram still stands for the whole uniform sample. The
    budget is doubled, up to 1e9, while fewer than 300 would be visited in expectation; if
    fewer than 200 entities are visited, the sample is paired within itself instead.
    """
    members = sets if isinstance(sets, ElementSets) else ElementSets.from_sets(sets)
    if members.size < 2:
        raise InputError(f"the sample needs at least 2 entities; got {members.size}")
    n_total = total_entities or members.size
    rng = np.random.default_rng(seed)
    order = rng.permutation(members.size)[: min(sample, members.size)]
    visited = np.zeros(0, dtype=np.int64)
    if members.size > len(order):
        drawn = members.subset(order)
        wanted = np.unique(drawn.elements)
        starts, posted = wanted_postings(members.offsets, members.elements, wanted)
        ids = np.searchsorted(wanted, drawn.elements)  # every drawn element is wanted
        costs = segment_sums(np.diff(starts)[ids], drawn.offsets)
        budget = AGAINST_ALL_BUDGET
        chance = visit_chances(costs, budget)
        enough = min(1.5 * MIN_AGAINST_ALL, len(order))  # so that fewer than 200 visited is rare
        while chance.sum() < enough and budget < MAX_AGAINST_ALL_BUDGET:
            budget = min(2 * budget, MAX_AGAINST_ALL_BUDGET)
            chance = visit_chances(costs, budget)
        visited = np.flatnonzero(rng.random(len(order)) < chance)
    if len(visited) >= min(MIN_AGAINST_ALL, len(order)) > 0:
        by_id = visited[np.argsort(order[visited])]
        picked, weights = order[by_id], 1.0 / chance[by_id]
        mine = drawn.subset(by_id)
        counts, sums, identical, per_entity, at_or_above = _against_all_histogram(
            mine.offsets, np.searchsorted(wanted, mine.elements), starts, posted, members.set_sizes, picked,
            weights, HISTOGRAM_BINS, 2.0 if threshold is None else threshold,
            min(len(picked), 2 * numba.get_num_threads()),
        )
        # factor rescales from the input's own entity count to the requested total.
        hist = _make(counts, sums, len(order), n_total, identical, "against_all", threshold,
                     factor=n_total / members.size)
        hist = replace(hist, entity_pairs=per_entity * (n_total / members.size), entity_weights=weights,
                       visited_entities=len(picked),
                       entity_lists=at_or_above * (n_total / members.size) if threshold is not None else None)
    else:
        picked = np.sort(order)
        hist = histogram(_within_jaccard(members.subset(picked)), len(picked), n_total, threshold)
    return replace(hist, source_entities=members.size)


def sample_histogram_from_signatures(
    signatures: pl.DataFrame,
    params: SignatureParams,
    sample: int = 2000,
    seed: int = 0,
    total_entities: int | None = None,
    threshold: float | None = None,
) -> PairHistogram:
    """Estimated pair-similarity histogram of ``sample`` rows of a signature table."""
    picked = sample_keys(signatures["entity"], sample, seed)
    sub = signatures.filter(pl.col("entity").is_in(picked.implode())).sort("entity")
    drawn_from = signatures["entity"].n_unique()
    hist = histogram(estimated_pair_similarities(sub, params), sub.height, total_entities or drawn_from, threshold)
    return replace(hist, source_entities=drawn_from, basis="signature estimates")
