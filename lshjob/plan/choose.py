"""The one planning function and the plan it returns, for ``lshjob plan`` and ``lshjob run``.

:func:`choose_plan` takes the threshold and, in data mode, the pair-similarity histogram of a
sample (:mod:`lshjob.plan.similarity`); the command and the run build the histogram from
their input and call it with the same options, so the same sample, seed and sample size give
the same (k, b, r). Its :class:`Plan` is what the run's manifest stores under ``plan``
(:meth:`Plan.to_dict`) and what the audit and the reports read back (:meth:`Plan.from_dict`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from enum import StrEnum

from lshjob.errors import ParameterError
from lshjob.plan.banding import (
    DEFAULT_PERMS_CHOICES,
    Banding,
    PairHistogram,
    candidate_probability,
    check_explicit,
    crowd_split,
    data_plans,
    meets,
    theory_plans,
)
from lshjob.sign.signatures import SignatureParams

THEORY_PERMS = 128  # k when none is given and the plan is not chosen from a sample
RECALL_OF = ("lists", "pairs")  # what the recall target is met on: the top-k lists, or every pair >= threshold
PLAN_BY = ("candidates", "cost")  # the rule of data mode: fewest expected candidates, or least predicted seconds
COST_PERMS_OPH = (512, 1024)  # k tried beyond the default choices when planning by cost with oph
JUDGED_RECALL = 1e-12  # a given (b, r) is judged, never refused: every plan reaches this

IDENTICAL_ONLY = ("threshold 1.0: only identical sets qualify; they are grouped exactly, "
                  "without signatures or bands")
FEW_SETS = ("fewer than two different sets: only identical sets can pair; they are grouped exactly, "
            "without signatures or bands")


class PlanMode(StrEnum):
    THEORY = "theory"  # weighted FP/FN areas of the S-curve (no sample)
    DATA = "data"  # fewest expected candidates meeting the recall target on a sample
    EXPLICIT = "explicit"  # a given (b, r), judged (on the sample, if any)
    IDENTICAL = "identical-only"  # threshold 1.0 or fewer than two different sets: no bands


@dataclass(frozen=True)
class Plan:
    """What to sign and band: k = ``perms`` hashes of ``scheme`` and ``seed`` (the hash family;
    None where not known), cut into ``bands`` bands of ``rows`` rows (all None when only
    identical sets can pair), with the figures predicted for it and why it was chosen.

    ``predicted`` holds the chosen (k, b, r)'s figures (theory areas or data-mode expectations),
    ``runners_up`` the next best plans' figures, ``sample`` what the sample held (the manifest's
    keys: entities, design, identical_pairs, pairs_at_or_above_threshold).
    """

    mode: PlanMode
    why: str
    threshold: float | None = None
    perms: int | None = None
    bands: int | None = None
    rows: int | None = None
    seed: int | None = None
    scheme: str | None = None
    predicted: dict | None = None
    runners_up: tuple[dict, ...] = ()
    sample: dict | None = None
    recall: float | None = None  # the recall target (data and explicit modes)
    histogram: PairHistogram | None = field(default=None, compare=False, repr=False)

    @property
    def banded(self) -> bool:
        return self.mode != PlanMode.IDENTICAL

    def signature_params(self) -> SignatureParams:
        """The signatures the bands are cut from (the run gives scheme and seed)."""
        return SignatureParams(scheme=self.scheme, perms=self.perms, seed=self.seed)

    def to_dict(self) -> dict:
        """The manifest's ``plan``: mode and why; with bands also perms, bands, rows, predicted
        and (data and explicit modes) sample."""
        out: dict = {"mode": str(self.mode), "why": self.why}
        if not self.banded:
            return out
        out.update(perms=self.perms, bands=self.bands, rows=self.rows, predicted=dict(self.predicted or {}))
        if self.sample is not None:
            out["sample"] = dict(self.sample)
        return out

    @classmethod
    def from_dict(cls, d: dict, threshold: float | None = None, seed: int | None = None,
                  scheme: str | None = None) -> Plan:
        """A plan read back from a manifest's ``plan`` (threshold, seed and scheme are in its
        ``options``: see :meth:`from_manifest`)."""
        return cls(PlanMode(d["mode"]), d.get("why", ""), threshold, d.get("perms"), d.get("bands"), d.get("rows"),
                   seed, scheme, d.get("predicted"), (), d.get("sample"))

    @classmethod
    def from_manifest(cls, manifest: dict) -> Plan:
        options = manifest.get("options") or {}
        return cls.from_dict(manifest["plan"], options.get("threshold"), options.get("seed"), options.get("scheme"))


def choose_plan(
    threshold: float,
    histogram: PairHistogram | None = None,
    *,
    perms: int | None = None,
    bands: int | None = None,
    rows: int | None = None,
    recall: float = 0.95,
    fp_weight: float = 0.5,
    fn_weight: float = 0.5,
    max_candidates: float | None = None,
    runners_up: int = 5,
    distinct_sets: int | None = None,
    signature_perms: int | None = None,
    seed: int | None = None,
    scheme: str | None = None,
    plan_by: str = "candidates",
    costing: Callable[[dict], float] | None = None,
    crowd_size: int | None = None,
    top_k: int | None = None,
) -> Plan:
    """Choose (k, b, r) for Jaccard ``threshold``; options are checked by the caller.

    * threshold 1.0, or fewer than two different sets (``distinct_sets``, when known): no bands;
    * no ``histogram``: theory mode, the least ``fp_weight`` x FP + ``fn_weight`` x FN area for k
      (``perms``, default 128);
    * with a ``histogram``: data mode, the plan meeting ``recall`` with the fewest expected
      candidate pairs, k among 32, 64, 128 and 256 unless ``perms`` is given (or the histogram
      was estimated from signatures of length ``signature_perms``).

    With ``bands`` and ``rows`` that plan is judged instead (``meets_target`` says whether it
    reaches ``recall``), and the runners-up are the chosen plans. Above ``max_candidates``
    expected candidate pairs the plan is refused, unless ``crowd_size`` (the join's, data mode
    sampled against all) is given: then only the pairs outside crowds count, the pairs the
    join writes (:func:`lshjob.plan.banding.crowd_split`), and in data mode the first plan of
    the ranking whose written pairs fit is chosen. ``seed`` and ``scheme`` are the hash family's
    (see :meth:`Plan.signature_params`).

    ``plan_by="cost"`` (data mode, with ``costing``: a plan's figures -> predicted total
    seconds, :mod:`lshjob.plan.cost`): among the plans meeting ``recall``, the least predicted
    seconds; k also 512 and 1024 with ``scheme="oph"`` (one hash an element: a longer
    signature costs little to sign). Each plan's figures then hold ``predicted_seconds``.

    ``top_k``: data mode meets ``recall`` on the published top-k lists rather than on every pair
    at or above the threshold (:func:`lshjob.plan.banding.list_recall`), when the histogram holds
    each sampled entity's pairs (sampled against all); otherwise on every pair.
    """
    if plan_by not in PLAN_BY:
        raise ParameterError(f"--plan-by must be one of {', '.join(PLAN_BY)}; got {plan_by!r}")
    if plan_by == "cost" and costing is None:
        raise ParameterError("--plan-by cost needs a cost model (lshjob.plan.cost)")
    if threshold >= 1.0:
        return Plan(PlanMode.IDENTICAL, IDENTICAL_ONLY, threshold, seed=seed, scheme=scheme)
    if distinct_sets is not None and distinct_sets < 2:
        return Plan(PlanMode.IDENTICAL, FEW_SETS, threshold, seed=seed, scheme=scheme)
    explicit = (bands, rows) if bands is not None else None
    if histogram is None:
        k = perms or THEORY_PERMS
        if explicit:
            check_explicit(k, *explicit)
        ranked = theory_plans(threshold, k, fp_weight, fn_weight)
        best = next(p for p in ranked if (p.bands, p.rows) == explicit) if explicit else ranked[0]
        others = [p for p in ranked if p is not best][:runners_up]
        figures = [_theory_figures(p, threshold) for p in [best, *others]]
        why = (f"given by --bands {bands} --rows {rows}" if explicit else
               f"theory mode: least {fp_weight:g} x false-positive + {fn_weight:g} x false-negative "
               f"area of the S-curve for k={k}")
        mode = PlanMode.EXPLICIT if explicit else PlanMode.THEORY
    else:
        k = perms or signature_perms
        choices = (k,) if k else DEFAULT_PERMS_CHOICES
        if explicit:
            k = k or THEORY_PERMS
            check_explicit(k, *explicit)
            judged = next(p for p in data_plans(threshold, histogram, (k,), JUDGED_RECALL, top_k)
                          if (p.bands, p.rows) == explicit)
            judged.meets_target = meets(judged, recall)
            ranked = [judged]
            if runners_up:
                try:
                    ranked += data_plans(threshold, histogram, choices, recall, top_k)
                except ParameterError:
                    pass
            why, mode = f"given by --bands {bands} --rows {rows}", PlanMode.EXPLICIT
        elif plan_by == "cost":
            if not k and scheme == "oph":
                choices = DEFAULT_PERMS_CHOICES + COST_PERMS_OPH
            ranked = _by_cost(data_plans(threshold, histogram, choices, recall, top_k), costing)
            why, mode = _data_why(histogram, recall, ranked, "least predicted seconds"), PlanMode.DATA
        else:
            ranked = data_plans(threshold, histogram, choices, recall, top_k)
            why, mode = _data_why(histogram, recall, ranked), PlanMode.DATA
        written = None
        if max_candidates is not None and crowd_size and ranked[0].expected_candidates > max_candidates:
            fitted, written, fits = _fit_cap(ranked if mode == PlanMode.DATA else ranked[:1], histogram,
                                             max_candidates, crowd_size)
            if fits and mode == PlanMode.DATA:
                ranked = fitted
                why += (f"; the first plan ranked whose pairs outside crowds of {crowd_size}+ members fit "
                        f"--max-candidates")
        figures = [p.as_dict() for p in ranked[: runners_up + 1]]
        if written:
            figures[0].update(written)
        if plan_by == "cost":
            for f in figures:
                f["predicted_seconds"] = costing(f)
    chosen = figures[0]
    plan = Plan(
        mode, why, threshold, chosen["perms"], chosen["bands"], chosen["rows"], seed, scheme,
        chosen, tuple(figures[1:]),
        _sample_facts(histogram, threshold) if histogram is not None else None,
        recall if histogram is not None else None, histogram,
    )
    if max_candidates is not None:
        check_predicted(plan, max_candidates)
    return plan


def check_predicted(plan: Plan, max_candidates: float) -> None:
    """Refuse a plan predicting more than ``max_candidates`` candidate pairs written by the
    join (all its candidate pairs unless the pairs in crowds were predicted apart)."""
    predicted = plan.predicted or {}
    expected = predicted.get("expected_candidates", 0)
    written = predicted.get("expected_written_pairs", expected)
    if written > max_candidates:
        raise ParameterError(
            f"the plan (k={plan.perms}, b={plan.bands}, r={plan.rows}) predicts "
            f"{expected:.3g} candidate pairs at threshold {plan.threshold}"
            + (f" ({written:.3g} outside crowds, written by the join)" if written != expected else "")
            + f", more than --max-candidates {max_candidates:.3g}; raise the threshold or --max-candidates"
        )


def _fit_cap(ranked: list, histogram: PairHistogram, cap: float, crowd_size: int) -> tuple[list, dict | None, bool]:
    """The ranking with its first plan whose pairs outside crowds fit ``cap`` moved to the
    front, that plan's split and True; when none fits, the ranking unchanged, its first plan's
    split (None without per-entity figures) and False."""
    first = None
    for i, p in enumerate(ranked):
        crowded = crowd_split(histogram, p.bands, p.rows, crowd_size)
        if crowded is None:
            break
        written = p.expected_candidates * (1.0 - crowded)
        split = {"expected_crowd_pairs": p.expected_candidates - written, "expected_written_pairs": written,
                 "crowd_size": crowd_size}
        first = first or split
        if written <= cap:
            return [p, *ranked[:i], *ranked[i + 1:]], split, True
    return ranked, first, False


def _by_cost(plans: list, costing: Callable[[dict], float]) -> list:
    """Plans by predicted total seconds (ties: smaller k, fewer bands)."""
    def seconds(p) -> float:  # the figures the cost needs, without copying the whole plan
        return costing({"perms": p.perms, "bands": p.bands, "rows": p.rows, "expected_candidates":
                        p.expected_candidates, "expected_verified": p.expected_verified})

    return sorted(plans, key=lambda p: (round(seconds(p), 6), p.perms, p.bands))


def _data_why(hist: PairHistogram, recall: float, ranked: list, rule: str = "fewest expected candidates") -> str:
    against = "all" if hist.design == "against_all" else "each other"
    drawn = hist.source_entities
    scaled = f"; pairs scaled from a uniform sample of {drawn}" if drawn and drawn != hist.total_entities else ""
    visited = hist.visited_entities
    weighed = (f", {visited} of them visited and weighted by 1 / their chance" if visited is not None
               and visited < hist.sample_entities else "")
    lists = ranked[0].expected_list_recall is not None
    what = "recall of the top-k lists (its one-sided 95% lower bound)" if lists else "recall"
    return (f"data mode: {rule} with expected {what} >= {recall}; {hist.basis} of "
            f"{hist.sample_entities} sampled entities against {against}{weighed} "
            f"({hist.total_entities} entities{scaled})")


def _sample_facts(hist: PairHistogram, threshold: float) -> dict:
    return {"entities": hist.sample_entities, "design": hist.design, "identical_pairs": hist.identical_pairs,
            "pairs_at_or_above_threshold": hist.pairs_at_or_above(threshold)}


def _theory_figures(p: Banding, threshold: float) -> dict:
    return {
        "perms": p.perms,
        "bands": p.bands,
        "rows": p.rows,
        "false_positive_area": p.false_positive,
        "false_negative_area": p.false_negative,
        "weighted_error": p.weighted_error,
        "approximate_threshold": p.approximate_threshold,
        "probability_at_threshold": float(candidate_probability(threshold, p.bands, p.rows)),
    }
