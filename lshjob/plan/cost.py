"""Cost model: each stage's seconds and peak memory, and the run's disk, from the counts a plan predicts.

A run's stages cost what they touch. Each stage's seconds (and its peak resident memory) are
``constant + sum(coefficient x count)`` over the counts of :data:`SECONDS_TERMS` and
:data:`MEMORY_TERMS` (events, membership rows, sets, signature words, bucket rows, candidate
pairs, verified pairs, published rows). The coefficients are fitted to the runs of a
calibration (``lshjob calibrate``: small generated runs on this machine, kept in
:func:`model_path`) or, on a machine that never calibrated, to the runs in the shipped
default (``cost_default.json``, whose ``provenance`` says where and how they were measured).

Fitting: for each stage, least squares of the relative error (every run counts alike) with
no coefficient below zero, the best of every subset of the terms (there are at most three);
memory slopes within what a row can hold (:data:`MEMORY_CEILING`). Signing and banding hold
one slice of representatives at a time: their memory counts the signature words and bucket
rows of one slice (:meth:`CostModel.stage_memory`).
Refining from real runs (their manifests, or a store's history): per stage, the ratio of
what was measured to what the calibrated model predicts for that run, beyond the constant,
the geometric mean over the runs weighted by their size, multiplies the forecast beyond the
constant. Seconds are refined only where the run's part beyond the constant is at least the
constant (a sample's run spends most of a small stage on fixed costs, and timing noise on a
shared machine then passes for a slope); memory everywhere (a stage's memory fitted with no
slope takes its first term's from the run). One real run of
the data to be indexed (a sample) so carries its shape (set sizes, bucket sizes, candidates per
entity) into the forecast at any size. Runs under 100,000 events are not used (their
seconds are the constant's, or a first run's compiling, more than the slopes'). A run also
corrects the plan's predicted candidate and verified pairs: the ratio of its measured to its
plan's predicted counts, and the share of entities left once identical sets collapse
(:func:`count_factors`).
"""

from __future__ import annotations

import itertools
import json
import math
import os
from dataclasses import dataclass, field, replace
from importlib import resources
from pathlib import Path

import numpy as np

STAGES = ("ingest", "collapse", "plan", "sign", "band", "join", "verify", "publish")
FORMAT_NAME, FORMAT_VERSION = "lshjob-cost-model", 1
MODEL_ENV = "LSHJOB_COST_MODEL"  # a model file to use instead of the user cache folder's
SHIPPED = "cost_default.json"

# counts each stage's seconds and memory depend on (names of Workload's properties)
SECONDS_TERMS = {
    "ingest": ("events",),
    "collapse": ("membership_rows",),
    "plan": ("entities",),
    "sign": ("hashed_words", "signature_words"),
    "band": ("signature_words", "bucket_rows"),
    "join": ("bucket_rows", "candidate_pairs"),
    "verify": ("candidate_pairs", "verified_pairs"),
    "publish": ("verified_pairs", "published_rows"),
}
MEMORY_TERMS = {
    "ingest": ("events",),
    "collapse": ("membership_rows",),
    "plan": ("membership_rows",),
    "sign": ("membership_rows", "signature_words"),
    "band": ("membership_rows", "signature_words", "bucket_rows"),
    "join": ("membership_rows", "bucket_rows", "candidate_pairs"),
    "verify": ("membership_rows", "candidate_pairs"),
    "publish": ("membership_rows", "verified_pairs", "published_rows"),
}
MIN_REFINE_EVENTS = 100_000  # smaller runs tell the constant (and a first run's compiling), not the slopes
# bytes one unit of a count may hold in memory, at most: a row of these tables is 8-40 bytes, held
# in a few copies at once; a fit steeper than this is noise (few calibration runs have the count)
MEMORY_CEILING = {"events": 64, "membership_rows": 64, "signature_words": 32, "bucket_rows": 64,
                  "candidate_pairs": 128, "verified_pairs": 256, "published_rows": 256}
SLICED = ("signature_words", "bucket_rows")  # held a slice at a time in signing and banding
# disk: rows written as Parquet, bytes a row uncompressed (an upper bound: Parquet compresses)
BUCKET_ROW_BYTES = 20  # band Int32, bucket UInt64, rep Int64
CANDIDATE_BYTES = 20  # left_rep, right_rep Int64, bands_shared Int32
SET_ROW_BYTES = 8  # an element code of a held set saved to the work folder (runs in parts)
DEFAULT_OUTPUT_ROW_BYTES = 12.0  # neighbours.parquet, compressed, bytes a row: the demo's index


@dataclass(frozen=True)
class Workload:
    """The counts of one run: measured (:meth:`from_manifest`) or predicted by a plan."""

    events: float
    entities: float
    membership_rows: float
    representatives: float
    perms: int
    bands: int
    scheme: str
    candidate_pairs: float
    verified_pairs: float
    published_rows: float
    shared_bucket_rows: float | None = None
    # the share of the candidate pairs in crowds (verification pairs a large bucket's members up
    # itself, the join writing none of their pairs; lshjob.index.join.base), when known
    crowd_share: float = 0.0
    # a crowd pair's cost against one of a crowd of at most CROWD_FLAT_UP_TO members (lshjob.plan.scaling)
    crowd_scale: float = 1.0

    @property
    def hashed_words(self) -> float:
        """Hash evaluations of signing: k a membership row (kperm), one (oph)."""
        return self.membership_rows * (self.perms if self.scheme == "kperm" else 1)

    @property
    def signature_words(self) -> float:
        return self.representatives * self.perms

    @property
    def bucket_rows(self) -> float:
        return self.representatives * self.bands

    def value(self, name: str) -> float:
        return float(getattr(self, name))

    def to_dict(self) -> dict:
        return {"events": self.events, "entities": self.entities, "membership_rows": self.membership_rows,
                "representatives": self.representatives, "perms": self.perms, "bands": self.bands,
                "scheme": self.scheme, "bucket_rows": self.bucket_rows, "candidate_pairs": self.candidate_pairs,
                "verified_pairs": self.verified_pairs, "published_rows": self.published_rows}

    @classmethod
    def from_manifest(cls, manifest: dict) -> Workload:
        c, plan, options = manifest["counts"], manifest.get("plan") or {}, manifest.get("options") or {}
        return cls(events=c["events"], entities=c["entities"], membership_rows=c.get("membership_rows", c["events"]),
                   representatives=c.get("representatives", c["entities"]), perms=plan.get("perms") or 0,
                   bands=plan.get("bands") or 0, scheme=options.get("scheme", "kperm"),
                   candidate_pairs=c.get("candidate_pairs", 0), verified_pairs=c.get("verified_pairs", 0),
                   published_rows=c.get("published_rows", 0), shared_bucket_rows=c.get("shared_bucket_rows"))

    @classmethod
    def predicted(cls, figures: dict, entities: float, events: float, *, membership_share: float = 1.0,
                  representative_share: float = 1.0, scheme: str = "kperm", top_k: int = 20) -> Workload:
        """The counts a run of ``entities`` sets and ``events`` events would see under the plan
        whose data-mode ``figures`` (:class:`lshjob.plan.banding.DataPlan`) are given.
        Published rows: each verified pair both ways, at most ``top_k`` an entity."""
        verified = figures.get("expected_verified", 0.0)
        return cls(events=events, entities=entities, membership_rows=events * membership_share,
                   representatives=entities * representative_share, perms=figures["perms"], bands=figures["bands"],
                   scheme=scheme, candidate_pairs=figures.get("expected_candidates", 0.0), verified_pairs=verified,
                   published_rows=min(2.0 * verified, entities * top_k))


@dataclass(frozen=True)
class Fit:
    """One stage's fitted ``constant + coefficients . counts`` over ``terms``."""

    terms: tuple[str, ...]
    constant: float
    coefficients: tuple[float, ...]

    def variable(self, w: Workload, sliced: Workload | None = None) -> float:
        """The counts' part; the terms of :data:`SLICED` counted in ``sliced`` when given (the
        counts of one slice)."""
        return float(sum(c * (sliced if sliced is not None and t in SLICED else w).value(t)
                         for c, t in zip(self.coefficients, self.terms)))

    def predict(self, w: Workload) -> float:
        return self.constant + self.variable(w)


def fit_stage(terms: tuple[str, ...], loads: list[Workload], measured: list[float],
              ceilings: dict[str, float] | None = None) -> Fit:
    """Non-negative least squares of the relative error over every subset of the terms (the
    constant always in): the subset with the least error whose coefficients are all >= 0 (and
    within ``ceilings``, by term, when given)."""
    y = np.asarray(measured, dtype=np.float64)
    weight = 1.0 / np.maximum(y, 1e-3 * max(float(y.max(initial=0.0)), 1e-9))
    full = np.array([[w.value(t) for t in terms] for w in loads], dtype=np.float64).reshape(len(loads), len(terms))
    best = (math.inf, Fit(terms, float(np.median(y)) if len(y) else 0.0, (0.0,) * len(terms)))
    for size in range(len(terms) + 1):
        for subset in itertools.combinations(range(len(terms)), size):
            x = np.column_stack([np.ones(len(y)), full[:, list(subset)]])
            scale = np.maximum(np.abs(x).max(axis=0), 1e-300)
            coef, *_ = np.linalg.lstsq(x / scale * weight[:, None], y * weight, rcond=None)
            coef = coef / scale
            if (coef < -1e-12).any():
                continue
            if ceilings and any(coef[i + 1] > ceilings.get(terms[j], math.inf) for i, j in enumerate(subset)):
                continue
            err = float(((((x @ coef) - y) * weight) ** 2).sum()) if len(y) else 0.0
            if err < best[0] - 1e-12:
                full_coef = [0.0] * len(terms)
                for i, j in enumerate(subset):
                    full_coef[j] = float(coef[i + 1])
                best = (err, Fit(terms, float(coef[0]), tuple(full_coef)))
    return best[1]


@dataclass
class CostModel:
    """Fitted coefficients from calibration ``points`` (each: ``workload``, ``seconds``,
    ``peak_memory_bytes``, as a manifest has them), refined by real runs' manifests."""

    points: list[dict]
    source: str  # "calibrated" or "shipped default"
    provenance: str
    path: str | None = None
    output_row_bytes: float = DEFAULT_OUTPUT_ROW_BYTES
    refined_from: list[str] = field(default_factory=list)
    not_refined_from: list[str] = field(default_factory=list)
    seconds: dict[str, Fit] = field(init=False)
    memory: dict[str, Fit] = field(init=False)
    factors: dict[str, dict[str, float]] = field(init=False)

    def __post_init__(self) -> None:
        loads = [Workload(**p["workload"]) for p in self.points]
        self.seconds = {s: fit_stage(SECONDS_TERMS[s], loads, [p["seconds"].get(s, 0.0) for p in self.points])
                        for s in STAGES}
        self.seconds["other"] = fit_stage((), loads, [max(p["seconds"]["total"] - sum(
            p["seconds"].get(s, 0.0) for s in STAGES), 0.0) for p in self.points])
        self.memory = {s: fit_stage(MEMORY_TERMS[s], loads, [p["peak_memory_bytes"].get(s, 0) for p in self.points],
                                    MEMORY_CEILING) for s in STAGES}
        self.factors = {"seconds": {}, "memory": {}}

    def refine(self, manifests: list[tuple[str, dict]]) -> CostModel:
        """Scale each stage's variable part by measured / predicted over real runs (see the module)."""
        logs: dict[str, dict[str, list[tuple[float, float]]]] = {"seconds": {}, "memory": {}}
        for where, m in manifests:
            if not (m.get("plan") or {}).get("bands") or (m.get("counts") or {}).get("events", 0) < MIN_REFINE_EVENTS:
                self.not_refined_from.append(where)  # too small, or identical sets only: no banded stages
                continue
            w = Workload.from_manifest(m)
            size = math.log1p(w.events)
            for kind, fits, measured in (("seconds", self.seconds, m["seconds"]),
                                         ("memory", self.memory, m["peak_memory_bytes"])):
                for stage in STAGES:
                    if stage not in measured:
                        continue
                    fit = fits[stage]
                    if kind == "memory" and fit.terms and not any(fit.coefficients):  # the run gives a slope
                        fit = fits[stage] = Fit(fit.terms, fit.constant, (1.0,) + (0.0,) * (len(fit.terms) - 1))
                    var = fit.variable(w)
                    beyond = measured[stage] - fit.constant
                    if var <= 0 or beyond <= 0 or (kind == "seconds" and beyond < fit.constant):
                        continue  # seconds: only where the counts' part of the run is at least the constant
                    logs[kind].setdefault(stage, []).append((math.log(beyond / var), size))
            out = m.get("output") or {}
            if out.get("rows"):
                self.output_row_bytes = out["bytes"] / out["rows"]
            self.refined_from.append(where)
        for kind, stages in logs.items():
            for stage, pairs in stages.items():
                total = sum(s for _, s in pairs)
                self.factors[kind][stage] = math.exp(sum(v * s for v, s in pairs) / total)
        return self

    def stage_seconds(self, w: Workload) -> dict[str, float]:
        out = {s: self._predict("seconds", self.seconds, s, w) for s in STAGES}
        out["total"] = sum(out.values()) + self.seconds["other"].predict(w)
        return out

    def stage_memory(self, w: Workload, slice_rows: float | None = None) -> dict[str, float]:
        """Peak memory per stage; ``slice_rows``: the representatives signed and banded at a time
        (the run's :meth:`lshjob.runtime.budget.Budget.sign_slice_rows`), which bounds the
        signature words and bucket rows signing and banding hold."""
        held = replace(w, representatives=min(w.representatives, slice_rows)) if slice_rows else w
        return {s: self._predict("memory", self.memory, s, w, held if s in ("sign", "band") else None)
                for s in STAGES}

    def _predict(self, kind: str, fits: dict[str, Fit], stage: str, w: Workload,
                 sliced: Workload | None = None) -> float:
        fit = fits[stage]
        return fit.constant + self.factors[kind].get(stage, 1.0) * fit.variable(w, sliced)

    def disk_bytes(self, w: Workload, in_parts: bool) -> dict[str, float]:
        """The work folder at its fullest (bucket files and candidates, upper bounds; the held
        sets when in parts) and the published index."""
        shared = w.shared_bucket_rows if w.shared_bucket_rows is not None else min(w.bucket_rows,
                                                                                    2.0 * w.candidate_pairs)
        work = shared * BUCKET_ROW_BYTES + w.candidate_pairs * CANDIDATE_BYTES
        if in_parts:
            work += w.membership_rows * SET_ROW_BYTES
        output = w.published_rows * self.output_row_bytes
        return {"work": work, "output": output, "total": work + output}

    def describe(self) -> dict:
        """Where the coefficients come from, for the forecast's ``coefficients``."""
        return {"source": self.source, "provenance": self.provenance, "path": self.path,
                "calibration_runs": len(self.points), "refined_from": list(self.refined_from),
                "not_refined_from": list(self.not_refined_from)}

    def to_json(self) -> dict:
        return {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "provenance": self.provenance,
                "points": self.points}


def count_factors(manifests: list[tuple[str, dict]]) -> dict[str, float]:
    """Measured / predicted candidate and verified pairs of real runs (geometric mean), the
    correction a forecast applies to its plan's predicted pairs, and the share of entities
    that are representatives (identical sets collapsed); 1 where no run tells."""
    logs: dict[str, list[float]] = {"candidate_pairs": [], "verified_pairs": [], "representative_share": []}
    for _, m in manifests:
        predicted, counts = (m.get("plan") or {}).get("predicted") or {}, m.get("counts") or {}
        if counts.get("entities") and counts.get("representatives"):
            logs["representative_share"].append(math.log(counts["representatives"] / counts["entities"]))
        for count, key in (("candidate_pairs", "expected_candidates"), ("verified_pairs", "expected_verified")):
            if predicted.get(key, 0) > 0 and counts.get(count, 0) > 0:
                logs[count].append(math.log(counts[count] / predicted[key]))
    return {k: math.exp(sum(v) / len(v)) if v else 1.0 for k, v in logs.items()}


def model_path() -> Path:
    """Where ``lshjob calibrate`` keeps this machine's model: ``$LSHJOB_COST_MODEL``, else
    ``$XDG_CACHE_HOME/lshjob/cost-model.json``, else ``~/.cache/lshjob/cost-model.json``."""
    if os.environ.get(MODEL_ENV):
        return Path(os.environ[MODEL_ENV])
    cache = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(cache) / "lshjob" / "cost-model.json"


def shipped_model() -> CostModel:
    record = json.loads(resources.files("lshjob.plan").joinpath(SHIPPED).read_text())
    return CostModel(record["points"], "shipped default", record["provenance"], None)


def load_model(path: Path | None = None) -> CostModel:
    """This machine's calibrated model, or the shipped default when there is none (a file
    that cannot be read counts as none: the forecast says which it used)."""
    path = Path(path) if path is not None else model_path()
    try:
        record = json.loads(path.read_text())
        if record.get("format") != FORMAT_NAME or record.get("format_version") != FORMAT_VERSION:
            return shipped_model()
        return CostModel(record["points"], "calibrated", record.get("provenance", ""), str(path))
    except (OSError, ValueError, KeyError, TypeError):
        return shipped_model()


def point_of(manifest: dict) -> dict:
    """A calibration point: a run's counts and its measured seconds and peaks."""
    w = Workload.from_manifest(manifest)
    load = {k: v for k, v in w.__dict__.items() if k not in ("shared_bucket_rows", "crowd_share", "crowd_scale")}
    return {"workload": load, "seconds": dict(manifest["seconds"]),
            "peak_memory_bytes": dict(manifest["peak_memory_bytes"])}
