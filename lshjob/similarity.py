"""Pair-similarity distribution of a sample of entities, for data-mode planning and audits.

Exact mode counts intersections through an inverted index (element -> sampled entities):
for a sample of m entities it visits sum over elements of (postings choose 2) pairs and
returns all m(m-1)/2 Jaccard similarities. Signature mode estimates them from signatures
(fraction of equal positions), for when only a signature file is at hand.
"""

from __future__ import annotations

import numba
import numpy as np
import polars as pl

from .errors import InputError
from .membership import Membership
from .planner import PairHistogram
from .signatures import signature_array

HISTOGRAM_BINS = 1000


def sample_keys(keys: pl.Series, m: int, seed: int = 0) -> pl.Series:
    """A seeded uniform sample of m distinct keys (all of them when there are at most m)."""
    uniq = keys.unique().sort()
    if uniq.len() <= m:
        return uniq
    idx = np.sort(np.random.default_rng(seed).choice(uniq.len(), size=m, replace=False))
    return uniq.gather(idx)


@numba.njit(cache=True)
def _postings(offsets, elems, n_elements):
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


def exact_pair_similarities(sets: pl.DataFrame) -> np.ndarray:
    """All pairwise exact Jaccard similarities among the entities of membership rows,
    pairs (i, j), i < j, in row-major order of sorted entity keys."""
    sets = Membership.from_sets(sets)
    if sets.size < 2:
        raise InputError(f"the sample needs at least 2 entities; got {sets.size}")
    starts, members = postings(sets)
    return _all_pairs_jaccard(sets.offsets, sets.elements, starts, members)


def postings(sets: Membership) -> tuple[np.ndarray, np.ndarray]:
    """Inverted index: entities holding element e are ``members[starts[e]:starts[e+1]]``."""
    return _postings(sets.offsets, sets.elements, sets.n_elements)


def estimated_pair_similarities(signatures: pl.DataFrame) -> np.ndarray:
    """All pairwise signature estimates among the rows of a signature table."""
    if signatures.height < 2:
        raise InputError(f"the sample needs at least 2 entities; got {signatures.height}")
    return _all_pairs_estimate(signature_array(signatures))


def histogram(similarities: np.ndarray, sample_entities: int, total_entities: int) -> PairHistogram:
    """Bin similarities below 1 (1000 bins) keeping each bin's mean similarity; pairs of
    identical sets (similarity 1) are counted apart (see :class:`PairHistogram`)."""
    identical = similarities >= 1.0
    rest = similarities[~identical]
    bins = np.minimum((rest * HISTOGRAM_BINS).astype(np.int64), HISTOGRAM_BINS - 1)
    counts = np.bincount(bins, minlength=HISTOGRAM_BINS)
    sums = np.bincount(bins, weights=rest, minlength=HISTOGRAM_BINS)
    keep = counts > 0
    return PairHistogram(
        similarity=sums[keep] / counts[keep],
        counts=counts[keep],
        sample_entities=sample_entities,
        total_entities=total_entities,
        identical_pairs=int(identical.sum()),
    )


def sample_histogram_from_sets(
    sets: pl.DataFrame, sample: int = 2000, seed: int = 0, total_entities: int | None = None
) -> PairHistogram:
    """Exact pair-similarity histogram of ``sample`` entities drawn from membership rows."""
    picked = sample_keys(sets["entity"], sample, seed)
    sub = sets.filter(pl.col("entity").is_in(picked.implode()))
    n_total = total_entities or sets["entity"].n_unique()
    sims = exact_pair_similarities(sub)
    return histogram(sims, picked.len(), n_total)


def sample_histogram_from_signatures(
    signatures: pl.DataFrame, sample: int = 2000, seed: int = 0, total_entities: int | None = None
) -> PairHistogram:
    """Estimated pair-similarity histogram of ``sample`` rows of a signature table."""
    picked = sample_keys(signatures["entity"], sample, seed)
    sub = signatures.filter(pl.col("entity").is_in(picked.implode())).sort("entity")
    n_total = total_entities or signatures["entity"].n_unique()
    return histogram(estimated_pair_similarities(sub), sub.height, n_total)
