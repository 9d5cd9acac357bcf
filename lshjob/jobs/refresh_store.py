"""The store's side of a refresh (for :mod:`lshjob.jobs.refresh`): the period files, the
store's facts, the pairs added and removed since the last version, and ``lshjob history``."""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.errors import ParameterError
from lshjob.index import publish
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh_fold as folding
from lshjob.jobs.diff import diff_indexes
from lshjob.sign.signatures import SignatureParams, signature_array, signature_column
from lshjob.sign.slices import sign_sets
from lshjob.store import catalog
from lshjob.store import files as store_files

STORE_FORMAT = "lshjob-store"
DIFF_PATHS = ("old", "new", "out")  # of the diff summary: folders of the store's work, not kept
MAX_SIGNATURE_DELTAS = 8  # delta files a period keeps before they are folded into one file


def pair_changes(previous: Path | None, built: Path) -> tuple[int, int, dict | None]:
    """Unordered pairs of the published index added and removed since the previous version
    (all of them added on a first refresh), and the summary of :func:`lshjob.jobs.diff.diff_indexes`
    between the two (None on a first refresh), as the run's record keeps it."""
    if previous is None:
        rows = pl.scan_parquet(built / publish.NEIGHBOURS)
        pairs = rows.select(pl.min_horizontal("entity", "neighbour").alias("a"),
                            pl.max_horizontal("entity", "neighbour").alias("b")).unique()
        return int(pairs.select(pl.len()).collect().item()), 0, None
    summary = diff_indexes(previous, built)
    kept = {k: v for k, v in summary.items() if k not in DIFF_PATHS}
    return summary["pairs_added"], summary["pairs_removed"], dict(kept, old_run_id=previous.name)


def store_periods(store: Path, folded: folding.Folded, plan: dict, rebuilt: bool, run_id: str,
                  known: dict[str, catalog.StoredFile]) -> dict:
    """Write the changed periods' sets (a delta file, or the period's one file) and their
    signatures (of the delta's rows alone: the period signature is the minimum over its
    files), every period's signatures when the plan is new; return the catalog's periods and
    files."""
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"]) if plan["perms"] else None
    periods, files = [], []

    def kept(path: str, kind: str, owner: str) -> catalog.StoredFile:
        return known.get(path) or entry(store, path, kind, owner)

    for p in folded.periods:
        for f in (p.sets_file, *p.set_deltas):
            if f in folded.pending:
                # uncompressed: every refresh scans the window's sets files (twice), and at 1M
                # patrons a scan of zstd pages took 2-4x as long (0.4-0.8 s against 0.18 s)
                files.append(store_files.write_table(store, f, folded.changed[p.period], "sets", run_id,
                                                     compression="uncompressed"))
            else:
                files.append(kept(f, "sets", p.run_id))
        signatures, deltas = p.signatures_file, p.signature_deltas
        if params is None:
            signatures, deltas = None, ()
        elif rebuilt or signatures is None:  # the whole period, one file
            if p.sets_file in folded.pending and not p.set_deltas:  # held whole by the fold, unique and sorted
                rows = folded.changed[p.period]
            else:
                rows = folding.scan_periods(store, [p], folded).unique(folding.PAIR).sort(folding.PAIR).collect()
            signatures, deltas = store_files.period_file(p.period, run_id, "signatures"), ()
            files.append(store_files.write_table(store, signatures, sign_sets(rows, ["entity"], params),
                                                 "signatures", run_id, compression="lz4"))
        elif p.period in folded.changed:  # a delta of the rows the sets delta added
            signed = sign_sets(folded.changed[p.period], ["entity"], params)
            if len(deltas) < MAX_SIGNATURE_DELTAS:
                deltas = (*deltas, store_files.period_file(p.period, run_id, "signature-delta"))
                files += [kept(f, "signatures", p.run_id) for f in (signatures, *deltas[:-1])]
                files.append(store_files.write_table(store, deltas[-1], signed, "signatures", run_id,
                                                     compression="lz4"))
            else:
                older = [known[f] for f in (signatures, *deltas)]
                signatures, deltas = store_files.period_file(p.period, run_id, "signatures"), ()
                files.append(store_files.write_table(store, signatures, _minimum_rows(store, older, signed),
                                                     "signatures", run_id, compression="lz4"))
        else:
            files += [kept(f, "signatures", p.run_id) for f in (signatures, *deltas)]
        periods.append(replace(p, signatures_file=signatures, signature_deltas=deltas))
    return {"periods": periods, "files": files}


def _minimum_rows(store: Path, stored: list[catalog.StoredFile], newest: pl.DataFrame) -> pl.DataFrame:
    """One table of a period's signatures from its files: each entity's element-wise minimum
    over its rows (MinHash of a union: the minimum of the parts')."""
    for f in stored:
        check_sha256(store, f)
    rows = pl.concat([store_files.read_table(store, f) for f in stored] + [newest], how="vertical_relaxed")
    rows = rows.sort("entity", maintain_order=True)
    matrix = signature_array(rows)
    starts = np.flatnonzero(np.r_[True, (rows["entity"] != rows["entity"].shift(1)).to_numpy()[1:]])
    least = np.minimum.reduceat(matrix, starts, axis=0)
    sizes = rows["set_size"].to_numpy()
    return pl.DataFrame({"entity": rows["entity"].gather(starts), "signature": signature_column(least),
                         "set_size": np.maximum.reduceat(sizes, starts).astype(np.uint32)})


def check_sha256(store: Path, stored: catalog.StoredFile) -> None:
    if store_files.sha256_of(Path(store) / stored.path) != stored.sha256:
        raise ParameterError(f"{store}: the store is damaged ({Path(store) / stored.path}: not the file the "
                             "catalog recorded (SHA-256 differs)); start a new store")


def entry(store: Path, relative: str, kind: str, run_id: str) -> catalog.StoredFile:
    path = Path(store) / relative
    return catalog.StoredFile(relative, kind, store_files.sha256_of(path), path.stat().st_size, run_id)


def facts(spec: EventSpec) -> dict[str, str]:
    return {"format": STORE_FORMAT, "format_version": "1", "spec": json.dumps(asdict(spec), sort_keys=True),
            "period": spec.period}


def check_facts(state: catalog.State, spec: EventSpec, store: Path) -> None:
    if state.facts.get("period") not in (None, spec.period):
        raise ParameterError(f"--store {store} keeps {state.facts['period']} periods; got --period {spec.period} "
                             "(start a new store for another period)")


def write_json(path: Path, data: dict) -> None:
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")
    os.replace(temporary, path)


def link_or_copy(source: Path, target: Path) -> None:
    try:
        os.link(source, target)
    except OSError:
        shutil.copyfile(source, target)


def inside(path: Path, folder: Path) -> bool:
    path, folder = Path(os.path.realpath(path)), Path(os.path.realpath(folder))
    return path == folder or folder in path.parents


def history(store: str | Path) -> dict:
    """Every refresh of ``store``, oldest first: id, start and end, window, batch rows, changed
    entities, seconds and peak memory per stage, plan, output SHA-256; and the versions kept."""
    store = Path(store)
    if not (store / catalog.CATALOG).is_file():
        raise ParameterError(f"{store}: no {catalog.CATALOG}; is this a store made by lshjob refresh?")
    state = catalog.read_state(store)
    return {"store": str(store.absolute()), "runs": catalog.runs(store), "plan": state.plan,
            "periods": [p.period.isoformat() for p in state.periods],
            "versions": [{"run_id": v.run_id, "folder": str(store / store_files.VERSIONS / v.folder),
                          "sha256": v.sha256, "rows": v.rows} for v in state.versions]}
