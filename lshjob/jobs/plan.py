"""File-level Python API of ``lshjob plan``: choose (k, b, r) in theory mode or from a sample
of events or signatures. Re-exported by :mod:`lshjob.jobs.sign`."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import polars as pl

from lshjob.plan import banding as planner
from lshjob.plan import similarity
from lshjob.errors import InputError, ParameterError
from lshjob.ingest.spec import EventSpec, load_sets
from lshjob.ingest.loading import load_membership
from lshjob.plan.banding import PairHistogram
from lshjob.sign.signatures import params_from_metadata, read_signatures


@dataclass
class PlanResult:
    """What ``lshjob plan`` decided and why."""

    mode: str
    threshold: float
    perms: int | None  # None at threshold 1.0 (identical sets only)
    bands: int | None  # None at threshold 1.0 (identical sets only)
    rows: int | None  # None at threshold 1.0 (identical sets only)
    chosen: dict
    runners_up: list[dict]
    sample: dict | None = None
    histogram: PairHistogram | None = None

    def as_dict(self) -> dict:
        return {
            "mode": self.mode,
            "threshold": self.threshold,
            "perms": self.perms,
            "bands": self.bands,
            "rows": self.rows,
            "chosen": self.chosen,
            "runners_up": self.runners_up,
            "sample": self.sample,
        }


def plan_banding(
    threshold: float,
    perms: int | None = None,
    recall: float = 0.95,
    sample: str | Path | None = None,
    spec: EventSpec | None = None,
    sample_size: int = 2000,
    entities: int | None = None,
    fp_weight: float = 0.5,
    fn_weight: float = 0.5,
    seed: int = 0,
    runners_up: int = 5,
    bands: int | None = None,
    rows: int | None = None,
) -> PlanResult:
    """Choose (k, b, r). Without ``sample``: theory mode (weighted FP/FN areas, k default 128).
    With ``sample`` (a signature file, or events read with ``spec``): data mode, the plan that
    meets ``recall`` with the fewest expected candidate pairs, scaled to ``entities``
    (default: the entity count of the sample file). With ``bands`` and ``rows`` that plan is
    judged instead of chosen; the runners-up are then the recommended plans."""
    if not 0.0 < threshold <= 1.0:
        raise ParameterError(f"--threshold must be in (0, 1]; got {threshold}")
    if threshold == 1.0:  # as lshjob run: identical sets only, grouped exactly
        return identical_only(threshold, sample)
    planner.validate(threshold, perms, fp_weight, fn_weight)
    if (bands is None) != (rows is None):
        raise ParameterError("--bands and --rows go together; give both or neither")
    explicit = (bands, rows) if bands is not None else None
    if sample_size < 2:
        raise ParameterError(f"--sample-size must be at least 2; got {sample_size}")
    if entities is not None and entities < 2:
        raise ParameterError(f"--entities must be at least 2; got {entities}")
    if sample is None:
        k = perms or 128
        if explicit:
            planner.check_explicit(k, *explicit)
        ranked = planner.theory_plans(threshold, k, fp_weight, fn_weight)
        best = next(p for p in ranked if (p.bands, p.rows) == explicit) if explicit else ranked[0]
        others = [_banding_dict(p, threshold) for p in ranked if p is not best][:runners_up]
        return PlanResult("theory", threshold, best.perms, best.bands, best.rows,
                          _banding_dict(best, threshold), others)
    if _is_signature_file(sample):
        table, meta = read_signatures(sample)
        if table.height < 2:
            raise InputError(f"{sample}: the sample needs at least 2 signature rows; got {table.height}")
        if perms is not None and perms > meta["k"]:
            raise ParameterError(f"--perms {perms} exceeds the signature length k={meta['k']} of {sample}")
        hist = similarity.sample_histogram_from_signatures(
            table, params_from_metadata(meta), sample_size, seed, entities, threshold
        )
        basis = "signature estimates"
        choices = (perms or meta["k"],)
    else:
        if spec is None:
            raise ParameterError(
                f"{sample}: is not a signature file; to plan from events give --entity and --element"
            )
        if spec.key_columns == ["entity"]:  # the streaming loader: 8-20 bytes an event, not ~100
            sets = load_membership(sample, spec)[0]
            n_entities = sets.size
        else:
            sets = load_sets(sample, spec)[0]
            n_entities = sets["entity"].n_unique()
        if n_entities < 2:
            raise InputError(f"{sample}: the sample needs at least 2 entities; got {n_entities}")
        hist = similarity.sample_histogram_from_sets(sets, sample_size, seed, entities, threshold)
        basis = "exact Jaccard"
        choices = (perms,) if perms is not None else planner.DEFAULT_PERMS_CHOICES
    if explicit:
        planner.check_explicit(choices[0] if len(choices) == 1 else 128, *explicit)
        k = choices[0] if len(choices) == 1 else 128
        best = next(p for p in planner.data_plans(threshold, hist, (k,), 1e-12)
                    if (p.bands, p.rows) == explicit)
        best.meets_target = best.expected_recall >= recall
        try:
            ranked = [best, *planner.data_plans(threshold, hist, choices, recall)]
        except ParameterError:
            ranked = [best]
    else:
        ranked = planner.data_plans(threshold, hist, choices, recall)
        best = ranked[0]
    info = {
        "path": str(sample),
        "similarity": basis,
        "sampled_entities": hist.sample_entities,
        "total_entities": hist.total_entities,
        "design": hist.design,
        "sampled_pairs": int(hist.counts.sum() + hist.identical_pairs),
        "sampled_identical_pairs": int(hist.identical_pairs),
        "expected_identical_pairs": hist.identical_pairs * hist.scale,
        "sampled_pairs_at_or_above_threshold": int(hist.pairs_at_or_above(threshold)),
        "recall_target": recall,
    }
    return PlanResult(
        "data", threshold, best.perms, best.bands, best.rows,
        best.as_dict(), [p.as_dict() for p in ranked[1 : runners_up + 1]], info, hist,
    )


IDENTICAL_ONLY = ("threshold 1.0: only identical sets qualify; the run groups them exactly, "
                  "without signatures or bands")


def identical_only(threshold: float, sample: str | Path | None) -> PlanResult:
    """The plan at threshold 1.0: no bands (the sample, if any, is not needed)."""
    why = IDENTICAL_ONLY + ("; the sample is not read" if sample is not None else "")
    return PlanResult("identical-only", threshold, None, None, None, {"why": why}, [])


def _banding_dict(p: planner.Banding, threshold: float) -> dict:
    return {
        "perms": p.perms,
        "bands": p.bands,
        "rows": p.rows,
        "false_positive_area": p.false_positive,
        "false_negative_area": p.false_negative,
        "weighted_error": p.weighted_error,
        "approximate_threshold": p.approximate_threshold,
        "probability_at_threshold": float(planner.candidate_probability(threshold, p.bands, p.rows)),
    }


def _is_signature_file(path: str | Path) -> bool:
    path = Path(path)
    if not path.is_file() or path.suffix.lower() not in (".parquet", ".pq"):
        return False
    try:
        return "lshjob" in pl.read_parquet_metadata(path)
    except Exception:
        return False
