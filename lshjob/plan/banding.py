"""Plan stage: choose signature length k, bands b and rows r for a Jaccard threshold.

All formulas are from Mining of Massive Datasets (Leskovec, Rajaraman, Ullman), section 3.4:
a pair of Jaccard similarity s agrees on one band of r rows with probability s**r, so it
shares at least one of b bands with probability 1 - (1 - s**r)**b (the S-curve), whose
steepest rise is near (1/b)**(1/r).

Theory mode weighs the false-positive area (integral of P over [0, t]) against the
false-negative area (integral of 1 - P over [t, 1]), as if similarities were uniform.
Data mode weighs P by the pair-similarity histogram of a sample (see
:mod:`lshjob.plan.similarity`), which is what a real run sees: almost every pair near 0.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from functools import lru_cache

import numpy as np

from lshjob.errors import ParameterError

DEFAULT_PERMS_CHOICES = (32, 64, 128, 256)
MAX_QUADRATURE_POINTS = 2048  # Gauss-Legendre: exact for polynomials of degree < 4096
TIE_TOLERANCE = 0.01  # plans within 1% of the fewest candidates count as tied
# a plan on the lists meets its target with its list recall's one-sided 95% lower bound (normal quantile)
LIST_BOUND_Z = 1.645


def candidate_probability(s, bands: int, rows: int):
    """P(pair of Jaccard similarity s shares at least one band) = 1 - (1 - s**rows)**bands.

    Mining of Massive Datasets (Leskovec, Rajaraman, Ullman), section 3.4.
    """
    s = np.asarray(s, dtype=np.float64)
    return 1.0 - (1.0 - s**rows) ** bands


def approximate_threshold(bands: int, rows: int) -> float:
    """Similarity where the S-curve rises fastest, about (1/b)**(1/r) (MMDS section 3.4)."""
    return (1.0 / bands) ** (1.0 / rows)


@lru_cache(maxsize=16)
def _legendre(points: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.legendre.leggauss(points)


def _nodes(a: float, b: float, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [a, b], exact for polynomials up to ``degree``:
    n points integrate degree 2n - 1 exactly. n is rounded up to a power of two so a plan
    enumeration computes few node sets (leggauss(2048) alone takes half a second)."""
    need = (degree + 2) // 2
    points = min(MAX_QUADRATURE_POINTS, 1 << (need - 1).bit_length())
    x, w = _legendre(points)
    half = (b - a) / 2.0
    return a + half * (x + 1.0), w * half


def false_positive_area(threshold: float, bands: int, rows: int) -> float:
    """Integral of P(s) over [0, t]: the weight of dissimilar pairs that become candidates.

    P is a polynomial of degree b*r, so Gauss-Legendre with n nodes, 2n > b*r, is exact up
    to rounding (Abramowitz and Stegun 25.4.29).
    """
    s, w = _nodes(0.0, threshold, bands * rows)
    return float(np.dot(w, candidate_probability(s, bands, rows)))


def false_negative_area(threshold: float, bands: int, rows: int) -> float:
    """Integral of 1 - P(s) over [t, 1]: the weight of similar pairs that are missed."""
    s, w = _nodes(threshold, 1.0, bands * rows)
    return float(np.dot(w, 1.0 - candidate_probability(s, bands, rows)))


@dataclass(frozen=True)
class Banding:
    """One (b, r) choice for signatures of length k, with its theory-mode figures."""

    bands: int
    rows: int
    perms: int
    false_positive: float
    false_negative: float
    weighted_error: float

    @property
    def approximate_threshold(self) -> float:
        return approximate_threshold(self.bands, self.rows)


def validate(threshold: float, perms: int | None = None, fp_weight: float = 0.5, fn_weight: float = 0.5) -> None:
    if not 0.0 < threshold < 1.0:
        raise ParameterError(f"--threshold must be in (0, 1); got {threshold}")
    if perms is not None and perms < 1:
        raise ParameterError(f"--perms must be at least 1; got {perms}")
    if fp_weight < 0 or fn_weight < 0:
        raise ParameterError(f"--fp-weight and --fn-weight must be >= 0; got {fp_weight} and {fn_weight}")
    if fp_weight == 0 and fn_weight == 0:
        raise ParameterError("--fp-weight and --fn-weight cannot both be 0")


def check_explicit(perms: int, bands: int, rows: int) -> None:
    if bands < 1 or rows < 1:
        raise ParameterError(f"--bands and --rows must be at least 1; got {bands} and {rows}")
    if bands * rows > perms:
        raise ParameterError(
            f"--bands x --rows must not exceed --perms: {bands} x {rows} = {bands * rows} > {perms}"
        )


def all_bandings(perms: int) -> list[tuple[int, int]]:
    """Every (b, r) with b*r <= k."""
    return [(b, r) for b in range(1, perms + 1) for r in range(1, perms // b + 1)]


def theory_plans(threshold: float, perms: int, fp_weight: float = 0.5, fn_weight: float = 0.5) -> list[Banding]:
    """Every (b, r) for k, best first by w_fp*FP + w_fn*FN (ties: fewer bands)."""
    validate(threshold, perms, fp_weight, fn_weight)
    pairs = all_bandings(perms)
    b = np.array([p[0] for p in pairs], dtype=np.float64)[:, None]
    r = np.array([p[1] for p in pairs], dtype=np.float64)[:, None]
    s_lo, w_lo = _nodes(0.0, threshold, perms)
    s_hi, w_hi = _nodes(threshold, 1.0, perms)
    fp = (candidate_probability(s_lo[None, :], b, r) * w_lo).sum(axis=1)
    fn = ((1.0 - candidate_probability(s_hi[None, :], b, r)) * w_hi).sum(axis=1)
    err = fp_weight * fp + fn_weight * fn
    order = np.lexsort((b[:, 0], err))
    return [
        Banding(int(b[i, 0]), int(r[i, 0]), perms, float(fp[i]), float(fn[i]), float(err[i]))
        for i in order
    ]


def theory_plan(threshold: float, perms: int, fp_weight: float = 0.5, fn_weight: float = 0.5) -> Banding:
    """The (b, r) minimising w_fp*FP + w_fn*FN for threshold t and k."""
    return theory_plans(threshold, perms, fp_weight, fn_weight)[0]


@dataclass(frozen=True)
class PairHistogram:
    """Pair-similarity distribution of a sample, scaled to the full entity count.

    ``counts[i]`` sampled pairs have mean similarity ``similarity[i]``. ``scale`` turns
    sampled pair counts into expected pair counts of the whole collection:

    * ``design="within"`` (all pairs among m sampled entities): N(N-1) / (m(m-1));
    * ``design="against_all"`` (each of m sampled entities paired with every entity): each
      unordered pair is seen from either end it has in the sample, 2m/N in expectation,
      so the scale is N / (2m). Pairs sharing no element are not listed (P(0) = 0).

    Pairs of identical sets are counted apart in ``identical_pairs``: the run collapses
    identical sets before banding and pairs them up afterwards, so banding neither finds
    nor misses them. ``source_entities``: how many entities the sample was drawn from (when
    fewer than ``total_entities``, a uniform sample of them); ``basis``: how the similarities
    were found (exact Jaccard, or signature estimates).
    """

    similarity: np.ndarray
    counts: np.ndarray
    sample_entities: int
    total_entities: int
    identical_pairs: float = 0
    design: str = "within"
    threshold: float | None = None
    at_or_above: np.ndarray | None = None
    source_entities: int | None = None
    basis: str = "exact Jaccard"
    # against_all only: entity_pairs[i, j] pairs of the i-th sampled entity with similarity in
    # [j, j + 1) / its column count (identical sets apart), scaled like counts
    entity_pairs: np.ndarray | None = field(default=None, compare=False, repr=False)
    # against_all only: what each row of entity_pairs counts for (1 / its chance to be visited;
    # None: 1 each), and how many sampled entities were visited (None: all of them)
    entity_weights: np.ndarray | None = field(default=None, compare=False, repr=False)
    visited_entities: int | None = None
    # against_all with a threshold only: entity_lists[i, 0] identical sets of the i-th sampled
    # entity, entity_lists[i, 1 + j] its pairs in the j-th of equal bins of [threshold, 1), scaled
    entity_lists: np.ndarray | None = field(default=None, compare=False, repr=False)

    def mask(self, threshold: float) -> np.ndarray:
        """Which entries hold pairs at or above ``threshold``. A histogram built for that
        threshold keeps the pairs on either side of it apart, so the answer is exact;
        otherwise the bin means decide (with a 1e-9 allowance for rounding in the means)."""
        if self.at_or_above is not None and self.threshold == threshold:
            return self.at_or_above
        return self.similarity >= threshold - 1e-9

    @property
    def scale(self) -> float:
        n, m = self.total_entities, self.sample_entities
        if self.design == "against_all":
            return n / (2.0 * m)
        return n * (n - 1) / (m * (m - 1))

    def pairs_at_or_above(self, threshold: float) -> float:
        return float(self.counts[self.mask(threshold)].sum())


@dataclass
class DataPlan:
    """A (k, b, r) judged against a sample's pair distribution."""

    perms: int
    bands: int
    rows: int
    expected_recall: float
    expected_candidates: float
    candidates_per_entity: float
    expected_verified: float
    expected_false_candidates: float
    bucket_rows: int
    approximate_threshold: float
    meets_target: bool = False
    notes: list[str] = field(default_factory=list)
    # of the published top-k lists (data_plans' top_k), and its lower bound, which met the target
    expected_list_recall: float | None = None
    list_recall_low: float | None = None

    def as_dict(self) -> dict:
        return asdict(self)


def data_plans(
    threshold: float,
    histogram: PairHistogram,
    perms_choices: tuple[int, ...] = DEFAULT_PERMS_CHOICES,
    recall: float = 0.95,
    top_k: int | None = None,
) -> list[DataPlan]:
    """Judge every (k, b, r) against the histogram; those meeting ``recall`` first, fewest
    expected candidates first (plans within 1% of the fewest are ordered by smaller k, then
    fewer bands, as they cost less to sign and to bucket). With ``top_k`` and per-entity
    figures in the histogram, ``recall`` is met by the expected recall of the published
    top-k lists (:func:`list_recall`) instead of that of every pair at or above the threshold."""
    validate(threshold)
    if not 0.0 < recall < 1.0:
        raise ParameterError(f"--recall must be in (0, 1); got {recall}")
    sim = histogram.similarity
    cnt = histogram.counts.astype(np.float64)
    above = histogram.mask(threshold)
    uniform_basis = cnt[above].sum() < 20
    s_hi, w_hi = _nodes(threshold, 1.0, max(perms_choices))
    plans = []
    for k in perms_choices:
        pairs = all_bandings(k)
        b = np.array([p[0] for p in pairs], dtype=np.float64)[:, None]
        r = np.array([p[1] for p in pairs], dtype=np.float64)[:, None]
        prob = candidate_probability(sim[None, :], b, r)
        expected = prob @ cnt * histogram.scale
        verified = prob[:, above] @ cnt[above] * histogram.scale
        if uniform_basis:
            rec = (candidate_probability(s_hi[None, :], b, r) * w_hi).sum(axis=1) / (1.0 - threshold)
        else:
            rec = verified / (cnt[above].sum() * histogram.scale)
        figures = None if top_k is None or uniform_basis else _list_figures(histogram, top_k, b[:, 0], r[:, 0])
        lists, low = (None, None) if figures is None else (figures[0], figures[0] - LIST_BOUND_Z * figures[1])
        target = rec if low is None else low
        for i, (bb, rr) in enumerate(pairs):
            plans.append(
                DataPlan(
                    perms=k, bands=bb, rows=rr,
                    expected_recall=float(rec[i]),
                    expected_candidates=float(expected[i]),
                    candidates_per_entity=float(2 * expected[i] / histogram.total_entities),
                    expected_verified=float(verified[i]),
                    expected_false_candidates=float(expected[i] - verified[i]),
                    bucket_rows=histogram.total_entities * bb,
                    approximate_threshold=approximate_threshold(bb, rr),
                    meets_target=bool(target[i] >= recall),
                    expected_list_recall=None if lists is None else float(lists[i]),
                    list_recall_low=None if low is None else float(low[i]),
                    notes=["recall assumes similarities uniform on [t, 1]: the sample has fewer "
                           "than 20 pairs at or above the threshold"] if uniform_basis else [],
                )
            )
    feasible = [p for p in plans if p.meets_target]
    if not feasible:
        best = max(plans, key=lambda p: (met_on(p), -p.perms))
        what = "recall" if best.expected_list_recall is None else f"recall of the top-{top_k} lists"
        bound = "" if best.list_recall_low is None else f" (lower bound {best.list_recall_low:.4f})"
        raise ParameterError(
            f"no plan reaches expected {what} {recall} at threshold {threshold} with k in "
            f"{', '.join(map(str, perms_choices))}; the nearest is k={best.perms}, b={best.bands}, "
            f"r={best.rows} with expected {what} {target_recall(best):.4f}{bound}"
            + _larger_k_hint(threshold, histogram, perms_choices, recall, top_k)
        )
    fewest = min(p.expected_candidates for p in feasible)
    tied = [p for p in feasible if p.expected_candidates <= fewest * (1 + TIE_TOLERANCE) + 1e-9]
    tied.sort(key=lambda p: (p.perms, p.bands, p.expected_candidates))
    in_tied = {id(p) for p in tied}  # by identity: a list's `in` compares every field of every plan
    rest = sorted((p for p in feasible if id(p) not in in_tied), key=lambda p: p.expected_candidates)
    return tied + rest


def crowd_split(histogram: PairHistogram, bands: int, rows: int, crowd_size: int) -> float | None:
    """The fraction of a plan's expected candidate pairs that fall in crowds, buckets of
    ``crowd_size`` members or more (the join lists their members; verification pairs them up,
    a bucket at a time, so the join never writes those pairs); None without per-entity figures.

    A sampled entity with pairs of similarity s_j shares one band's bucket with each with
    probability s_j**r (MMDS section 3.4), so its bucket holds 1 + sum_j s_j**r members in
    expectation (identical sets are collapsed first, so they add none); its candidate pairs,
    sum_j P(s_j), count as crowd pairs when that expectation reaches ``crowd_size``, and each
    entity's pairs count its weight (``entity_weights``). Bin midpoints stand for the
    similarities (bins of 0.02)."""
    pairs = histogram.entity_pairs
    if pairs is None or not len(pairs):
        return None
    s = (np.arange(pairs.shape[1]) + 0.5) / pairs.shape[1]
    crowded = 1.0 + pairs @ s**rows >= crowd_size
    per_entity = pairs @ candidate_probability(s, bands, rows)
    if histogram.entity_weights is not None:
        per_entity = per_entity * histogram.entity_weights
    total = per_entity.sum()
    return float(per_entity[crowded].sum() / total) if total > 0 else 0.0


def list_recall(histogram: PairHistogram, top_k: int, bands, rows) -> np.ndarray | None:
    """Expected recall of the published top-``top_k`` lists for each (``bands``, ``rows``) (arrays
    of one shape), from each sampled entity's pairs at or above the threshold; None without them.

    An entity's true list is its ``top_k`` most similar partners at or above the threshold:
    identical sets first (found always: they are paired before banding), then its pairs from
    the most similar bin down. Each listed pair is found with the S-curve's probability at its
    bin's midpoint, and each entity counts its weight (``entity_weights``), so the recall is
    found list places over all list places. A missed pair whose place a tied pair takes is
    counted missed: the figure errs low when many pairs tie at the k-th value."""
    figures = _list_figures(histogram, top_k, bands, rows)
    return None if figures is None else figures[0]


def list_recall_bound(histogram: PairHistogram, top_k: int, bands, rows, z: float = LIST_BOUND_Z) -> np.ndarray | None:
    """A one-sided lower confidence bound on :func:`list_recall`: the estimate less ``z``
    standard errors. The estimate is a ratio (found places over places, each sampled entity
    weighted), so its variance is the linearized one of a ratio estimator (Cochran, Sampling
    Techniques, 3rd ed., section 6.3; the with-replacement form, which errs wide):
    sum_i w_i^2 (f_i - R p_i)^2 / (sum_i w_i p_i)^2. The sample's few hundred lists leave
    the estimate a standard error of about 0.005-0.01."""
    figures = _list_figures(histogram, top_k, bands, rows)
    return None if figures is None else figures[0] - z * figures[1]


def _list_figures(histogram: PairHistogram, top_k: int, bands, rows) -> tuple[np.ndarray, np.ndarray] | None:
    """(:func:`list_recall`, its standard error), each of the shape of ``bands`` and ``rows``."""
    lists = histogram.entity_lists
    if lists is None or not len(lists) or histogram.threshold is None:
        return None
    weights = np.ones(len(lists)) if histogram.entity_weights is None else histogram.entity_weights
    counts = np.concatenate((lists[:, :1], lists[:, :0:-1]), axis=1)  # identical, then bins from the top down
    before = np.cumsum(counts, axis=1) - counts
    taken = np.clip(top_k - before, 0.0, counts)  # list places each bin fills
    places = taken.sum(axis=1)
    total = weights @ places
    if total <= 0:
        return None
    t = histogram.threshold
    mids = t + (1.0 - t) * (np.arange(lists.shape[1] - 1)[::-1] + 0.5) / (lists.shape[1] - 1)
    chance = np.concatenate(([1.0], mids))  # found chance of each column of ``taken``
    b, r = np.broadcast_arrays(np.asarray(bands, dtype=np.float64), np.asarray(rows, dtype=np.float64))
    found = candidate_probability(chance[None, :], b.reshape(-1, 1), r.reshape(-1, 1))  # 1 at chance 1
    per_entity = found @ taken.T  # plans x entities: each entity's found places
    ratio = per_entity @ weights / total
    spread = (per_entity - ratio[:, None] * places[None, :]) * weights[None, :]
    error = np.sqrt((spread**2).sum(axis=1)) / total
    return ratio.reshape(b.shape), error.reshape(b.shape)


def target_recall(plan: DataPlan) -> float:
    """The expected recall a plan's target was judged on: of the top-k lists when figured."""
    return target_recall_of(plan.as_dict())


def met_on(plan: DataPlan) -> float:
    """The figure a plan meets its target on: the lists' lower bound when figured (data_plans)."""
    return target_recall(plan) if plan.list_recall_low is None else plan.list_recall_low


def meets(plan: DataPlan, recall: float) -> bool:
    return met_on(plan) >= recall


def target_recall_of(figures: dict) -> float | None:
    """:func:`target_recall` of a plan's figures (``Plan.predicted``, a manifest's ``plan.predicted``)."""
    lists = figures.get("expected_list_recall")
    return figures.get("expected_recall") if lists is None else lists


def _larger_k_hint(threshold, histogram, perms_choices, recall, top_k=None) -> str:
    k = max(perms_choices)
    while k < 1024:
        k *= 2
        try:
            plan = data_plans(threshold, histogram, (k,), recall, top_k)[0]
        except ParameterError:
            continue
        return f"; k={plan.perms} (b={plan.bands}, r={plan.rows}) would reach it"
    return ""
