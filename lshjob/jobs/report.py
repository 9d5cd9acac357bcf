"""What the index report shows, gathered from an index folder: the manifest (read with
:func:`lshjob.index.publish.read_manifest`), the neighbour table's distributions, the last
audit (the JSON ``lshjob audit --json`` prints; the audit stores nothing itself) and, when the
run's events are still where the manifest says, the sample's pair-similarity histogram
redrawn as the planner drew it (:func:`lshjob.plan.similarity.sample_histogram_from_sets`).

The page itself is built in :mod:`lshjob.report.page`.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.contracts.manifest import Manifest
from lshjob.errors import InputError
from lshjob.index.publish import open_index
from lshjob.ingest.loading import load_membership
from lshjob.ingest.spec import EventSpec, load_sets
from lshjob.jobs import refresh
from lshjob.plan import similarity
from lshjob.plan.banding import PairHistogram
from lshjob.plan.cost import Workload, load_model
from lshjob.plan.forecast import forecast, forecast_curve
from lshjob.runtime.remote import local_or_none, refuse_uri

AUDIT_KEYS = ("recall", "predicted_recall", "sampled_entities")  # entries of an audit the report reads


@dataclass
class ReportData:
    """Everything the page shows. ``neighbours_per_entity[i]``: how many neighbours entity i
    has in the index (entities without any included, from the manifest's entity count);
    ``jaccard``: the Jaccard of every published row; ``notes``: what could not be shown, and why."""

    index: Path
    manifest: Manifest
    neighbours_per_entity: np.ndarray
    jaccard: np.ndarray
    audit: dict | None = None
    histogram: PairHistogram | None = None
    notes: list[str] = field(default_factory=list)
    forecast: dict | None = None  # curves against N and forecast per stage (:func:`run_forecast`)
    history: list[dict] | None = None  # a store's refreshes, oldest first


def gather(index_dir: str | Path, audit: str | Path | dict | None = None, sample: bool = True,
           store: str | Path | None = None) -> ReportData:
    """The report's data for the index in ``index_dir``. ``audit``: an audit's report (the dict
    :func:`lshjob.audit.check.audit_index` returns) or a file holding it as JSON. ``sample``:
    redraw the planner's sample histogram from the run's events when they exist. ``store``: a
    refresh store whose history is shown."""
    refuse_uri(index_dir, "report")
    index_dir = local_or_none(index_dir) or Path(index_dir)
    manifest, neighbours = open_index(index_dir)
    table = pl.read_parquet(neighbours, columns=["entity", "jaccard"])
    per_entity = table.group_by("entity").len()["len"].to_numpy().astype(np.int64)
    without = max(0, int(manifest.counts.get("entities", per_entity.size)) - per_entity.size)
    data = ReportData(index_dir, manifest, np.concatenate([per_entity, np.zeros(without, dtype=np.int64)]),
                      table["jaccard"].to_numpy().astype(np.float64))
    if audit is not None:
        data.audit = audit if isinstance(audit, dict) else read_audit(audit)
        audited = data.audit.get("index")
        if audited is not None and Path(audited).resolve() != index_dir.resolve():
            data.notes.append(f"the audit was of {audited}, not of {index_dir}")
    else:
        data.notes.append("no audit given (--audit FILE, the JSON of lshjob audit --json): measured recall not shown")
    if sample:
        data.histogram = _sample_histogram(manifest, data.notes)
    else:
        data.notes.append("sample histogram not drawn (--no-sample)")
    data.forecast = run_forecast(manifest)
    if data.forecast is None and manifest.plan.get("bands") and "events" not in manifest.counts:
        data.notes.append("no forecast: this index was updated by lshjob refresh from the store's state, which "
                          "reads only the touched entities; the forecast compares whole runs (refresh --full)")
    if store is not None:
        data.history = refresh.history(store)["runs"]
    return data


CURVE_FACTORS = (0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0)  # the report's curves: sizes as multiples of the run's


def run_forecast(manifest: Manifest) -> dict | None:
    """The cost model (:func:`lshjob.plan.cost.load_model`, not refined by this run: the point
    shows how far the run is from it; a first run also compiles) applied to the run's counts
    (per stage, beside the measured) and to the same shape at other sizes."""
    if not manifest.plan.get("bands") or "events" not in manifest.counts:  # no plan, or not a whole run
        return None
    record = manifest.to_json()
    model = load_model()
    load = Workload.from_manifest(record)
    at = forecast(model, load, manifest.memory_budget_bytes)
    curve = forecast_curve(model, load, [load.entities * f for f in CURVE_FACTORS], manifest.memory_budget_bytes,
                           manifest.top_k_effective)
    point = {"entities": load.entities, "seconds": manifest.seconds["total"],
             "peak_memory_bytes": max(manifest.peak_memory_bytes.values(), default=0),
             "index_bytes": (manifest.output or {}).get("bytes")}
    return {"curve": curve, "point": point, "seconds": at["seconds"], "peak_by_stage": at["peak_memory_by_stage"],
            "peak": at["peak_memory_bytes"], "measured_seconds": dict(manifest.seconds),
            "measured_peak": dict(manifest.peak_memory_bytes), "coefficients": at["coefficients"]}


def read_audit(path: str | Path) -> dict:
    """The audit report in ``path`` (the JSON ``lshjob audit --json`` prints), or a one-line InputError."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such file (--audit takes the JSON printed by lshjob audit --json)")
    try:
        record = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not valid JSON ({type(exc).__name__}); --audit takes the JSON printed by "
                         "lshjob audit --json") from None
    if not isinstance(record, dict) or "audited" not in record:
        raise InputError(f"{path}: not an lshjob audit report (no 'audited' entry); --audit takes the JSON "
                         "printed by lshjob audit --json")
    if record["audited"]:
        for key in AUDIT_KEYS:
            if key not in record:
                raise InputError(f"{path}: not an lshjob audit report (no '{key}' entry)")
    return record


def _sample_histogram(manifest: Manifest, notes: list[str]) -> PairHistogram | None:
    """The planner's sample histogram, redrawn from the run's events (seed 0, as the run draws)."""
    plan, threshold = manifest.plan, manifest.options["threshold"]
    if not plan.get("bands") or threshold >= 1.0:
        notes.append("no banded plan: no sample histogram")
        return None
    source = manifest.inputs["source"]
    if not isinstance(source, str) or not Path(source).exists():
        notes.append(f"the run's events ({source}) are not there any more: sample histogram not drawn")
        return None
    spec = EventSpec(**manifest.spec)
    sets = load_membership(source, spec)[0] if spec.key_columns == ["entity"] else load_sets(source, spec)[0]
    if sets.size < 2:
        notes.append(f"the run's events hold {sets.size} set(s) once filtered: no sample histogram")
        return None
    return similarity.sample_histogram_from_sets(sets, manifest.options.get("sample_size", 2000), 0,
                                                 None, threshold)
