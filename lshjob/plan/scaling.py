"""A forecast scaled from runs of a sample: counts at the full size, and each stage's seconds.

A run of a uniform sample of the entities measures what a calibration done at another
moment cannot: this data's shape and this machine's speed now. Scaling it to N entities
needs the counts the full run will see and how each stage's seconds grow with them.

Counts (:func:`project_counts`), from the sample's own structure (:class:`SampleProfile`,
made by :mod:`lshjob.jobs.sample_profile`):

* distinct sets (representatives): Shlosser's estimator from how often each distinct set
  occurs in the sample (:func:`shlosser_distinct`);
* candidate pairs: a pair lies in a bucket of a band; each pair of representatives of the
  sample's buckets stands for 1 / (p_u p_v) pairs at full size, p the chance a distinct set
  of the full data is in the sample (Horvitz and Thompson, JASA 1952): about 1 for a set seen
  more than once in the sample (it is frequent), and for the sets seen once the p that makes
  them and the others add up to the estimated distinct sets. A bucket of a repeated and b
  once-seen members so holds C(a,2) + a b / p + C(b,2) / p^2 pairs and a + b / p members at
  full size; when that passes the join's ``max_bucket`` its pairs are not written (the
  join's oversize rule: they are counted apart and skipped);
* whether the join writes a row per band a pair met in or one row a pair (its rule on the
  pair rows, as the sample's run repeated its pairs);
* verified pairs: the sample's similar pairs that share a bucket the join keeps at full size,
  each counted once and weighted by what its two sets stand for at full size
  (:func:`lshjob.plan.sample_weights.similar_at_full_size`; without them, the run's verified
  pairs in proportion to the pairs kept); published rows an entity grown as they grew between
  the two largest runs, at most top-k.

Seconds (:func:`scale_seconds`): each stage's measured seconds are ``fixed + rate x driver``
(:data:`DRIVERS`: the count the stage's work grows with); with runs of the sample at two
sizes or more, ``fixed`` is the intercept of the line through them, kept between 0 and half
the larger run's seconds (process start, imports and compiled-kernel loads are not scaled);
with one run, the cost model's constant, at most half the run's seconds. The rate is the
largest run's own: a run measured now, on this machine, under its present load. CPU seconds
(a manifest's ``cpu_seconds``) scale the same way; verification's driver counts a crowd's pair
at :data:`CROWD_PAIR_COST` of a written candidate row (less in crowds over
:data:`CROWD_FLAT_UP_TO` members) and a published row at :data:`LIST_ROW_COST`, the crowds'
share and cost scale from the sample's buckets (:meth:`SampleProfile.crowds`). Peak memory:
:mod:`lshjob.plan.peak_memory`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from lshjob.plan.cost import STAGES, CostModel, Workload
from lshjob.plan.sample_weights import shlosser_distinct, similar_at_full_size
from lshjob.plan.similarity import AGAINST_ALL_BUDGET
from lshjob.runtime.budget import default_memory

# the join writing a row per band a pair met in against grouping its pairs first, seconds a pair:
# 1.7 s CPU against 28 s for the same 97M pair rows (docs/performance.md, long-tailed data at 300k)
ROWS_PER_BAND_JOIN = 1.7 / 28
MAX_FIXED_SHARE = 0.5  # a stage's fixed seconds: at most this share of the largest sample run's


# Verification's driver, in written candidate rows (each read and intersected): a crowd's pair
# (made and intersected a crowd's prefix index at a time, lshjob.index.verify._crowds) costs
# CROWD_PAIR_COST of a row, and a published row LIST_ROW_COST (the deduplication, the top-k cuts
# and the estimates, which grow with the lists, not the pairs). Fitted on a profiled run of the
# long-tailed bench's 100k sample (bench/forecast.py, lists' recall, crowds up to 50,000): 0.149 s
# for 1.5M written rows, 0.152 s for 12.5M crowd pairs, 0.264 s for 1.56M published rows.
CROWD_PAIR_COST = 0.12
LIST_ROW_COST = 1.7
# A pair of a crowd over CROWD_FLAT_UP_TO members costs sqrt(CROWD_FLAT_UP_TO / members) of one in
# a smaller crowd (a crowd's work grows as members^1.5 beyond it: the prefix filter and the top-k
# floors pass over more of its pairs). Fitted, not derived: at 1M the crowds' pairs (up to 23,246
# members) cost 6.0 ns against 12.2 ns in the 100k sample (crowds up to 2,493), both profiled.
CROWD_FLAT_UP_TO = 2000


def _driver_verify(w: Workload, visits) -> float:
    return (w.candidate_pairs * (1.0 - w.crowd_share * (1.0 - CROWD_PAIR_COST * w.crowd_scale))
            + LIST_ROW_COST * w.published_rows)


def _driver_join(w: Workload, visits) -> float:
    """The bucket rows and the pairs written: a crowd's pairs are not (its members are listed)."""
    return w.bucket_rows + w.candidate_pairs * (1.0 - w.crowd_share)


def _driver_join_all(w: Workload, visits) -> float:
    return w.bucket_rows + w.candidate_pairs


# the plan stage: a set's row passed over while indexing the sampled entities' elements, against a
# posting visited (a rough weight: the pass is a compiled scan; the visits are what grows)
PLANNER_ROW_WEIGHT = 0.02


def _driver_sign(w: Workload, visits) -> float:
    return w.hashed_words + w.signature_words


def _driver_plan(w: Workload, visits) -> float:
    return PLANNER_ROW_WEIGHT * w.membership_rows + (visits(w.entities) if visits else 0.0)


# the count each stage's seconds grow with (the cost model's terms, one sum a stage); ``visits``:
# the planner's posting visits at a number of entities (SampleProfile.visits_at), when known
DRIVERS = {
    "ingest": lambda w, visits: w.events,
    "collapse": lambda w, visits: w.membership_rows,
    "plan": _driver_plan,
    "sign": _driver_sign,
    "band": lambda w, visits: w.bucket_rows,
    "join": _driver_join,
    "verify": _driver_verify,
    "publish": lambda w, visits: w.verified_pairs + w.published_rows,
}


@dataclass(frozen=True)
class SampleProfile:
    """What a sample of ``entities`` of a population holds under a plan: its representatives'
    ``multiplicities`` (entities a distinct set stands for), and its shared buckets over all
    bands as ``bucket_counts`` buckets holding ``bucket_repeated`` representatives seen more
    than once in the sample and ``bucket_single`` seen once (two or more in all); the plan's
    ``bands``; the planner's posting visits on the sample."""

    entities: int
    multiplicities: np.ndarray
    bucket_repeated: np.ndarray
    bucket_single: np.ndarray
    bucket_counts: np.ndarray
    bands: int
    planner_visits: float = 0.0
    # the similar pairs of buckets kept at full size, when known: (weights, max_bucket) -> (first
    # members, second members, share looked at) (lshjob.jobs.sample_profile.similar_found)
    similar_found: object = field(default=None, compare=False, repr=False)

    def visits_at(self, entities: float) -> float:
        """The planner's posting visits at ``entities``: posting lists grow with the entities
        (a uniform sample holds its share of each), up to the planner's cut."""
        return min(self.planner_visits * entities / max(self.entities, 1), AGAINST_ALL_BUDGET)

    @property
    def representatives(self) -> int:
        return int(len(self.multiplicities))

    @property
    def seen_once(self) -> int:
        return int((self.multiplicities == 1).sum())

    def pair_rows(self, weight: float = 1.0, max_bucket: float = math.inf) -> tuple[float, float]:
        """(all, kept) pairs counted once per band when each representative seen once in the
        sample stands for ``weight`` at full size and one seen more often for itself (module
        docstring): all the buckets' pairs, and those of buckets whose size at full size stays
        within ``max_bucket``."""
        a, b = self.bucket_repeated.astype(np.float64), self.bucket_single.astype(np.float64)
        pairs = self.bucket_counts * (a * (a - 1) / 2 + a * b * weight + b * (b - 1) / 2 * weight * weight)
        return float(pairs.sum()), float(pairs[a + b * weight <= max_bucket].sum())

    def crowd_share(self, crowd_size: float, max_bucket: float, weight: float = 1.0, thin: float = 1.0) -> float:
        """The share of the kept pairs (:meth:`pair_rows`) in buckets of ``crowd_size`` members or
        more: at full size (``weight``), or in a uniform share ``thin`` of the sample (a nested
        sample: each bucket keeps that share of its members)."""
        return self.crowds(crowd_size, max_bucket, weight, thin)[0]

    def crowds(self, crowd_size: float, max_bucket: float, weight: float = 1.0,
               thin: float = 1.0) -> tuple[float, float]:
        """(:meth:`crowd_share`, the crowds' cost a pair against a crowd of at most
        :data:`CROWD_FLAT_UP_TO` members: the mean of sqrt(CROWD_FLAT_UP_TO / members), at most 1,
        over the crowds' pairs)."""
        a, b = self.bucket_repeated.astype(np.float64), self.bucket_single.astype(np.float64)
        if thin < 1.0:
            size = (a + b) * thin
            pairs = self.bucket_counts * np.maximum(size * (size - 1) / 2, 0.0)
        else:
            size = a + b * weight
            pairs = self.bucket_counts * (a * (a - 1) / 2 + a * b * weight + b * (b - 1) / 2 * weight * weight)
        kept = pairs[size <= max_bucket].sum()
        crowded = (size <= max_bucket) & (size >= crowd_size)
        in_crowds = pairs[crowded].sum()
        if kept <= 0 or in_crowds <= 0:
            return 0.0, 1.0
        scale = np.minimum(1.0, np.sqrt(CROWD_FLAT_UP_TO / np.maximum(size[crowded], 1.0)))
        return float(in_crowds / kept), float((pairs[crowded] * scale).sum() / in_crowds)


@dataclass
class Projection:
    """The counts of the full run (``workload``) and how they were found (``facts``)."""

    workload: Workload
    facts: dict = field(default_factory=dict)
    visits: object = None  # the planner's posting visits at a number of entities, when known
    runs: list = field(default_factory=list)  # the sample's runs' counts, with their crowds' share


def project_counts(profile: SampleProfile, runs: list[SampleRun], figures: dict, entities: float, events: float,
                   membership_share: float, scheme: str, top_k: int, max_bucket: float,
                   rows_above: float = math.inf, max_repeat: float = 0.0,
                   crowd_size: float = math.inf, crowd_cap: float | None = None) -> Projection:
    """The counts a run of ``entities`` sets and ``events`` events would see under the plan
    of ``figures`` (perms, bands), projected from the sample's ``profile`` (module docstring).
    ``runs``: the counts of runs of the sample (or of nested samples of it), smallest first:
    the largest one's candidate pairs are scaled as the pairs kept (its verified pairs too when
    the profile has no similar pairs: ``SampleProfile.similar_found``); its published
    rows an entity grow as they grew from the smaller run to it (at most ``top_k``). Without
    runs the plan's predictions of ``figures`` are rescaled instead.

    The join's way of writing pairs (:class:`lshjob.index.join.base.JoinSettings`): a row per
    band a pair met in when the pair rows pass ``rows_above`` and pairs repeat at most
    ``max_repeat`` times (as in the sample's run); else one row a pair, the rows divided by
    the sample run's repeats. Written a row per band, the pairs of buckets of ``crowd_size``
    members or more are left to verification (crowds): their share of the pairs, at full size
    and in each run (``Projection.runs``), from the sample's buckets; buckets are then kept up
    to ``crowd_cap`` members (``JoinSettings.crowd_cap``) instead of ``max_bucket``."""
    last = runs[-1] if runs else None
    run = last.workload if last else None
    share = profile.entities / max(entities, 1.0)
    reps = max(shlosser_distinct(profile.multiplicities, share), float(profile.representatives))
    reps = min(reps, entities)
    growth = reps / max(profile.representatives, 1)
    once = profile.seen_once  # the sets seen more often are all there at full size: the others grow
    weight = max((reps - (profile.representatives - once)) / once, 1.0) if once else 1.0
    all_n, kept_n = profile.pair_rows(1.0, max_bucket)
    all_full, kept_full = profile.pair_rows(weight, max_bucket)
    kept_ratio = kept_full / kept_n if kept_n > 0 else growth * growth
    similar_n = similar_full = None  # similar pairs of kept buckets, in the sample and at full size
    if profile.similar_found is not None:
        similar_n, similar_full = similar_at_full_size(profile.similar_found, profile.multiplicities, share,
                                                       max_bucket)
    rows_per_band = False
    if run is not None and run.candidate_pairs > 0:
        repeats = last.repeats
        rows_per_band = kept_full > rows_above and repeats <= max_repeat
        if rows_per_band and crowd_cap is not None and crowd_cap > max_bucket:  # more kept: still a row per band
            return project_counts(profile, runs, figures, entities, events, membership_share, scheme, top_k,
                                  crowd_cap, rows_above, max_repeat, crowd_size)
        candidates = kept_full if rows_per_band else kept_full / repeats
        if last.skew is None:  # no skew report: the run's own count, scaled
            candidates = run.candidate_pairs * kept_ratio
        verified = similar_full if similar_n else run.verified_pairs * kept_ratio
        published = entities * per_entity_rows([r.workload for r in runs], entities, top_k)
        basis = "the sample's run"
    else:  # the planner's predictions at this size assume no collapse and no skipped buckets
        candidates = kept_full
        verified = (similar_full if similar_full is not None else
                    figures.get("expected_verified", 0.0) * (kept_full / all_full if all_full > 0 else 1.0))
        published = 2.0 * verified
        basis = "the sample's buckets"
    published = min(published, entities * top_k)
    crowded, scale = profile.crowds(crowd_size, max_bucket, weight) if rows_per_band else (0.0, 1.0)
    w = Workload(events=events, entities=entities, membership_rows=events * membership_share,
                 representatives=reps, perms=figures["perms"], bands=figures["bands"], scheme=scheme,
                 candidate_pairs=candidates, verified_pairs=verified, published_rows=published, crowd_share=crowded,
                 crowd_scale=scale)
    measured = []
    for r in runs:
        share, cost = (profile.crowds(crowd_size, max_bucket, thin=r.workload.entities / max(profile.entities, 1))
                       if r.rows_per_band else (0.0, 1.0))
        measured.append(replace(r.workload, crowd_share=share, crowd_scale=cost))
    facts = {"sample_entities": profile.entities, "sample_representatives": profile.representatives,
             "representatives": round(reps), "representative_growth": round(growth, 4),
             "weight_of_sets_seen_once": round(weight, 4),
             "sample_pair_rows": round(all_n), "pair_rows": round(all_full), "pair_rows_kept": round(kept_full),
             "pairs_basis": basis, "max_bucket": max_bucket, "rows_per_band": rows_per_band,
             "sample_rows_per_band": bool(last and last.rows_per_band),
             "similar_pairs": None if similar_full is None else round(similar_full),
             "sample_similar_pairs": None if similar_n is None else round(similar_n),
             "crowd_share": round(crowded, 4), "crowd_pair_scale": round(scale, 4),
             "sample_crowd_shares": [round(r.crowd_share, 4) for r in measured]}
    return Projection(w, facts, runs=measured)


def per_entity_rows(runs: list[Workload], entities: float, top_k: int) -> float:
    """Published rows an entity at ``entities``: the largest run's, grown by the power of the
    entities it grew by between the two largest runs (an exponent in [0, 1]; none with one
    run), at most ``top_k``."""
    big = runs[-1]
    rows = big.published_rows / max(big.entities, 1)
    small = next((w for w in reversed(runs[:-1]) if w.entities < big.entities and w.published_rows > 0), None)
    if small is not None and rows > 0:
        exponent = math.log(rows / (small.published_rows / small.entities)) / math.log(big.entities / small.entities)
        rows *= (entities / big.entities) ** min(max(exponent, 0.0), 1.0)
    return min(rows, float(top_k))


def fixed_and_rate(drivers: list[float], seconds: list[float], constant: float) -> tuple[float, float]:
    """A stage's (fixed seconds, seconds a unit of driver) from runs of the sample at the sizes
    of ``drivers``, the largest last (module docstring); ``constant``: the cost model's."""
    big_d, big_t = drivers[-1], seconds[-1]
    cap = MAX_FIXED_SHARE * big_t
    if len(drivers) > 1 and big_d > drivers[0]:
        d, t = np.asarray(drivers, dtype=np.float64), np.asarray(seconds, dtype=np.float64)
        slope = float(np.polyfit(d, t, 1)[0]) if len(d) > 2 else (t[-1] - t[0]) / (d[-1] - d[0])
        fixed = big_t - max(slope, 0.0) * big_d
        fixed = min(max(fixed, 0.0), cap, float(t.min()))
    else:
        fixed = min(max(constant, 0.0), cap)
    rate = (big_t - fixed) / big_d if big_d > 0 else 0.0
    return fixed, rate


def scale_seconds(model: CostModel, runs: list[tuple[Workload, dict]], target: Workload,
                  visits=None, join_factor: float = 1.0) -> tuple[dict, dict]:
    """Seconds per stage (and ``total``) at ``target`` from ``runs`` of the sample (each its
    counts and its manifest's ``seconds``, or ``cpu_seconds``), smallest first; and each
    stage's fixed seconds.
    ``visits``: the planner's posting visits at a number of entities (:meth:`SampleProfile.visits_at`);
    ``join_factor`` multiplies the join's scaled part (:data:`ROWS_PER_BAND_JOIN`)."""
    out, fixed_of = {}, {}
    for stage in STAGES:
        # ROWS_PER_BAND_JOIN was measured against all the pair rows, the crowds' included
        driver = _driver_join_all if stage == "join" and join_factor != 1.0 else DRIVERS[stage]
        timed = [(driver(w, visits), s[stage]) for w, s in runs if stage in s]
        if not timed:
            out[stage] = model.stage_seconds(target)[stage]
            continue
        drivers, seconds = [d for d, _ in timed], [t for _, t in timed]
        fixed, rate = fixed_and_rate(drivers, seconds, model.seconds[stage].constant)
        out[stage] = fixed + rate * driver(target, visits) * (join_factor if stage == "join" else 1.0)
        fixed_of[stage] = round(fixed, 3)
    other = min(max(s["total"] - sum(s.get(st, 0.0) for st in STAGES), 0.0) for _, s in runs)
    out["total"] = sum(out[s] for s in STAGES) + other
    return out, fixed_of


@dataclass(frozen=True)
class SampleRun:
    """A run of a sample: its counts, and from its manifest ``seconds``, ``peaks``
    (peak_memory_bytes), ``cpu`` (cpu_seconds; empty when not recorded), the join's ``skew``
    and the run's ``memory`` budget."""

    workload: Workload
    seconds: dict
    peaks: dict
    cpu: dict
    skew: dict | None
    memory: float  # its memory budget

    @property
    def rows_per_band(self) -> bool:
        """Whether its join wrote a row per band a pair met in (then it counts every pair row:
        those of buckets within ``max_bucket``) rather than one row a pair."""
        rows = _pair_rows(self.skew)
        return rows is not None and self.workload.candidate_pairs >= rows > 0

    @property
    def repeats(self) -> float:
        """Pair rows a distinct pair (1 when its join wrote a row per band)."""
        rows = _pair_rows(self.skew)
        if self.rows_per_band or not rows or self.workload.candidate_pairs <= 0:
            return 1.0
        return rows / self.workload.candidate_pairs


def _pair_rows(skew: dict | None) -> float | None:
    return None if not skew else float(skew.get("bucket_pairs", 0) + skew.get("split_pairs", 0))


def sample_runs(manifests: list[tuple[str, dict]], entities: float) -> list[SampleRun]:
    """The runs among ``manifests`` of fewer entities than ``entities`` with bands (runs of a
    sample of the data to forecast), smallest first."""
    found = []
    for _, m in manifests:
        counts = m.get("counts") or {}
        if (m.get("plan") or {}).get("bands") and 0 < counts.get("entities", 0) < entities and m.get("seconds"):
            found.append(SampleRun(Workload.from_manifest(m), dict(m["seconds"]),
                                   dict(m.get("peak_memory_bytes") or {}), dict(m.get("cpu_seconds") or {}),
                                   m.get("skew"), float(m.get("memory_budget_bytes") or default_memory())))
    found.sort(key=lambda r: r.workload.entities)
    return found


