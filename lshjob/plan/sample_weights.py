"""What a representative of a uniform sample stands for at full size: distinct sets from how
often each occurs in the sample, and the similar pairs of the sample weighted up to full size.

A set seen more than once in a sample of a share q of the entities is frequent: it is there at
full size too, and stands for itself. A set seen once stands for 1 / p sets, p its chance to be
in the sample; p is not known for each set, only on average (the ``weight`` that makes the sets
seen once and the others add up to the estimated distinct sets, Shlosser's estimator).

Similar pairs concentrate on sets that are more often repeated than the average set seen once
(small sets of popular elements: near one another, and drawn again and again); weighting their
pairs by the average weight squared overcounts them. So the sets are grouped (post-stratified)
by their similar partners in the sample (:data:`PARTNER_STRATA`) and each group's sets seen once
get the weight of their group (Horvitz and Thompson, JASA 1952, with weights estimated by strata).
"""

from __future__ import annotations

import numpy as np

# groups of representatives by their similar partners in the sample (lower bounds)
PARTNER_STRATA = (0, 1, 3, 10, 30, 100)


def shlosser_distinct(multiplicities: np.ndarray, share: float) -> float:
    """Distinct values in the whole population from a Bernoulli sample of a ``share`` of its
    rows in which distinct value i occurs ``multiplicities[i]`` times: Shlosser's estimator
    d + f1 * sum_i (1-q)^i f_i / sum_i i q (1-q)^(i-1) f_i, f_i the values seen i times
    (Shlosser 1981, as given by Haas, Naughton, Seshadri and Stokes, VLDB 1995, eq. 11)."""
    m = np.asarray(multiplicities, dtype=np.int64)
    d = float(len(m))
    if share >= 1.0 or d == 0:
        return d
    f = np.bincount(m).astype(np.float64)
    i = np.arange(len(f), dtype=np.float64)
    q = float(share)
    num = float((np.power(1 - q, i) * f)[1:].sum())
    den = float((i * q * np.power(1 - q, np.maximum(i - 1, 0)) * f)[1:].sum())
    return d + (f[1] if len(f) > 1 else 0.0) * num / den if den > 0 else d


def once_weight(multiplicities: np.ndarray, share: float) -> float:
    """What a set seen once in the sample stands for at full size: the estimated distinct sets
    less those seen more often, over those seen once (at least 1)."""
    m = np.asarray(multiplicities)
    once = int((m == 1).sum())
    if not once:
        return 1.0
    distinct = max(shlosser_distinct(m, share), float(len(m)))
    return max((distinct - (len(m) - once)) / once, 1.0)


def partner_weights(multiplicities: np.ndarray, partners: np.ndarray, share: float) -> np.ndarray:
    """Each representative's weight at full size: 1 when seen more than once, else its group's
    :func:`once_weight`, the groups by ``partners`` (similar partners in the sample)."""
    m = np.asarray(multiplicities)
    group = np.searchsorted(np.asarray(PARTNER_STRATA), partners, side="right")
    weights = np.ones(len(m), dtype=np.float64)
    for g in np.unique(group):
        members = group == g
        weights[members & (m == 1)] = once_weight(m[members], share)
    return weights


def similar_at_full_size(similar_found, multiplicities: np.ndarray, share: float,
                         max_bucket: float) -> tuple[float, float]:
    """(in the sample, at full size) the similar pairs that share a bucket the join keeps:
    ``similar_found(weights, max_bucket)`` gives the sample's similar pairs (first and second
    members' positions, and the share of first members looked at) when each representative
    stands for its weight; the pairs at full size are the sum of their weights' products."""
    left, right, looked = similar_found(1.0, max_bucket)
    in_sample = len(left) / (2.0 * looked)
    # a set's partners: the pairs it is second in, the first drawn from a share ``looked`` of the sets
    partners = np.bincount(right, minlength=len(multiplicities)) / looked
    weights = partner_weights(multiplicities, partners, share)
    left, right, looked = similar_found(weights, max_bucket)
    return in_sample, float((weights[left] * weights[right]).sum()) / (2.0 * looked)
