"""``lshjob calibrate``: fit the cost model (:mod:`lshjob.plan.cost`) to this machine.

A few whole runs (:func:`lshjob.jobs.run.run_job`) of generated sets at sizes and signature
lengths that pull the terms of the model apart (so the fit can tell signing's k from the
events), each timed stage by stage as every run is; their counts, seconds and peaks are the
model's points, written atomically to the user cache folder (:func:`lshjob.plan.cost.model_path`).
A first small run of each scheme, not kept, loads the compiled kernels (compiling them if the
cache is cold: ``lshjob compile-kernels``). The measured runs stop being added once
``budget_seconds`` are spent on them (three at least are kept).

The generated sets: sizes 1 + Poisson(24) elements drawn uniformly from 30 x N titles (or, in
two runs, from a few hundred titles, so that many pairs are candidates), and a tenth of the
entities copies of another with each element replaced with probability U(0, 0.6), so the runs
find candidates and verified pairs as real data does.

Also :func:`refine_sources`: the manifests of real runs (index folders, manifest files or a
refresh store) that refine a forecast.
"""

from __future__ import annotations

import json
import platform
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.atomic import atomic_file
from lshjob.errors import InputError, ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.options import RunOptions
from lshjob.jobs.run import run_job
from lshjob.plan.cost import FORMAT_NAME, FORMAT_VERSION, CostModel, model_path, point_of

# (entities, k, scheme, titles): smallest first, about 30 s in all here, warm. titles None: 30
# a set; a fixed few titles give many candidate pairs (the join's and verification's terms)
RUNS = ((20_000, 64, "kperm", None), (30_000, 128, "kperm", 150), (60_000, 256, "kperm", None),
        (120_000, 128, "kperm", None), (80_000, 512, "oph", None), (60_000, 64, "kperm", 400),
        (200_000, 64, "kperm", None), (400_000, 128, "kperm", None), (50_000, 1024, "oph", None),
        (800_000, 64, "kperm", None))
WARM_UP = ((5_000, 64, "kperm", None), (5_000, 64, "oph", None))  # each scheme, the sample against all


def calibration_events(entities: int, seed: int, titles: int | None = None) -> pl.DataFrame:
    """The generated (entity, element) events of the module docstring (``titles``: how many
    titles there are; default 30 a set)."""
    rng = np.random.default_rng(seed)
    sizes = 1 + rng.poisson(24, entities)
    entity = np.repeat(np.arange(entities, dtype=np.int64), sizes)
    element = rng.integers(0, titles or 30 * entities, len(entity))
    copies = rng.choice(entities, entities // 10, replace=False)
    sources = rng.integers(0, entities, len(copies))
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    frames = [pl.DataFrame({"entity": entity, "element": element})]
    keep = np.ones(len(entity), dtype=bool)
    for c in copies:
        keep[offsets[c]:offsets[c + 1]] = False
    extra_e, extra_x = [], []
    q = rng.uniform(0, 0.6, len(copies))
    for c, s, p in zip(copies, sources, q):
        src = element[offsets[s]:offsets[s + 1]].copy()
        swap = rng.random(len(src)) < p
        src[swap] = rng.integers(10**12, 2 * 10**12, int(swap.sum()))
        extra_e.append(np.full(len(src), c, dtype=np.int64))
        extra_x.append(src)
    frames = [pl.DataFrame({"entity": entity[keep], "element": element[keep]}),
              pl.DataFrame({"entity": np.concatenate(extra_e), "element": np.concatenate(extra_x)})]
    return pl.concat(frames)


def calibrate(out: str | Path | None = None, budget_seconds: float = 40.0, runs=RUNS, progress=None) -> dict:
    """Run the calibration, write the model to ``out`` (default :func:`model_path`) and return
    what ``lshjob calibrate --json`` prints."""
    if budget_seconds <= 0:
        raise ParameterError(f"--seconds must be above 0; got {budget_seconds}")
    path = Path(out) if out is not None else model_path()
    started = time.perf_counter()
    points, measured = [], []
    spec = EventSpec(entity="entity", element="element")
    with tempfile.TemporaryDirectory(prefix="lshjob-calibrate-") as tmp:
        warm = len(WARM_UP)
        for i, (n, k, scheme, titles) in enumerate([*WARM_UP, *runs]):
            if i == warm:
                measuring = time.perf_counter()
            if i >= warm + 3 and time.perf_counter() - measuring > budget_seconds:
                break
            events = Path(tmp) / f"events-{i}.parquet"
            calibration_events(n, i, titles).write_parquet(events)
            manifest = run_job(events, spec, RunOptions(threshold=0.5, perms=k, scheme=scheme), Path(tmp) / f"run-{i}")
            if progress is not None:
                progress(f"{n} entities, k={k} {scheme}: {manifest['seconds']['total']:.2f} s")
            if i < warm:
                continue  # loads (or compiles) the kernels: not a measurement
            points.append(point_of(manifest))
            measured.append({"entities": n, "perms": k, "scheme": scheme, "seconds": manifest["seconds"]["total"]})
    provenance = (f"lshjob calibrate on {platform.node()} ({platform.machine()}, {_cores()} cores, "
                  f"{_memory_gib():.0f} GiB) at {time.strftime('%Y-%m-%d %H:%M:%S UTC', time.gmtime())}: "
                  f"{len(points)} runs of generated sets, {min(p['entities'] for p in measured)}-"
                  f"{max(p['entities'] for p in measured)} entities, warm")
    record = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "provenance": provenance, "points": points}
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_file(path) as tmp_path:
        tmp_path.write_text(json.dumps(record, indent=1, sort_keys=True) + "\n")
    model = CostModel(points, "calibrated", provenance, str(path))
    return {"path": str(path), "provenance": provenance, "runs": measured,
            "seconds": round(time.perf_counter() - started, 2),
            "fit": {s: {"constant": f.constant, **dict(zip(f.terms, f.coefficients))}
                    for s, f in model.seconds.items()}}


def refine_sources(paths: list[str | Path]) -> list[tuple[str, dict]]:
    """The manifests of real runs: each path an index folder (its manifest.json), a manifest
    file, or a refresh store (the manifest of each version it keeps)."""
    found = []
    for p in paths:
        p = Path(p)
        if p.is_file():
            candidates = [p]
        elif (p / "manifest.json").is_file():
            candidates = [p / "manifest.json"]
        elif (p / "versions").is_dir():
            candidates = sorted((p / "versions").glob("*/manifest.json"))
        else:
            raise InputError(f"{p}: neither an index folder, a manifest.json nor a refresh store")
        for c in candidates:
            try:
                record = json.loads(c.read_text())
            except (OSError, ValueError) as exc:
                raise InputError(f"{c}: not a readable manifest ({exc})") from None
            if not isinstance(record, dict) or "counts" not in record or "seconds" not in record:
                raise InputError(f"{c}: not an lshjob manifest (no counts or seconds)")
            found.append((str(c), record))
    return found


def _cores() -> int:
    import os

    return os.cpu_count() or 1


def _memory_gib() -> float:
    import os

    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
