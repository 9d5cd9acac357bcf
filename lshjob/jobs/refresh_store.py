"""The store's side of a refresh (for :mod:`lshjob.jobs.refresh`): the period files, the
store's facts, the pairs added and removed since the last version, and ``lshjob history``."""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import asdict
from pathlib import Path

import polars as pl

from lshjob.errors import ParameterError
from lshjob.index import publish
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh_fold as folding
from lshjob.jobs.diff import diff_indexes
from lshjob.sign.signatures import SignatureParams
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
    """Write the changed periods' sets and every period's signatures that this plan has not
    signed yet; return the catalog's periods and files."""
    params = SignatureParams(scheme=plan["scheme"], perms=plan["perms"], seed=plan["seed"]) if plan["perms"] else None
    held = {p.period: p for p in folded.periods}
    before = {p.period: p for p in folded.replaced}
    periods, files = [], []
    for p in folded.periods:
        if p.period in folded.changed:
            files.append(store_files.write_table(store, p.sets_file, folded.changed[p.period], "sets", run_id))
        else:
            files.append(known.get(p.sets_file) or entry(store, p.sets_file, "sets", p.run_id))
        signatures = p.signatures_file
        if params is not None and (rebuilt or signatures is None or p.period in folded.changed):
            table = folded.changed.get(p.period)
            if table is None:
                table = store_files.read_table(store, held[p.period].sets_file)
            old = before.get(p.period)
            deltas: tuple[str, ...] = ()
            if not rebuilt and old is not None and old.signatures_file is not None and p.period in folded.added:
                # a delta file: only the entities that gained elements, signed over their period set
                gained = folded.added[p.period].implode()
                signed = sign_sets(table.filter(pl.col("entity").is_in(gained)), ["entity"], params)
                deltas = (*old.signature_deltas, store_files.period_file(p.period, run_id, "signature-delta"))
                files.append(store_files.write_table(store, deltas[-1], signed, "signatures", run_id,
                                                     compression="lz4"))
                if len(deltas) <= MAX_SIGNATURE_DELTAS:
                    signatures = old.signatures_file
                    files += [known[f] for f in (signatures, *deltas[:-1])]
                else:
                    files.pop()
                    signed = _newest_rows(store, [old.signatures_file, *deltas[:-1]], signed,
                                          [known[f] for f in (old.signatures_file, *deltas[:-1])])
                    deltas = ()
            else:
                signed = sign_sets(table, ["entity"], params)
            if not deltas:
                signatures = store_files.period_file(p.period, run_id, "signatures")
                files.append(store_files.write_table(store, signatures, signed, "signatures", run_id,
                                                     compression="lz4"))
        elif params is None:
            signatures, deltas = None, ()
        elif signatures is not None:
            deltas = p.signature_deltas
            files += [known.get(f) or entry(store, f, "signatures", p.run_id) for f in (signatures, *deltas)]
        else:
            deltas = ()
        periods.append(catalog.Period(p.period, p.sets_file, signatures, p.entities, p.membership_rows,
                                      p.run_id, deltas))
    return {"periods": periods, "files": files}


def _newest_rows(store: Path, paths: list[str], newest: pl.DataFrame, stored: list) -> pl.DataFrame:
    """One table of a period's signatures from its files, oldest first: each entity's newest row
    (a newer row signs a superset, so it is also the minimum of its rows)."""
    for f in stored:
        check_sha256(store, f)
    tables = [store_files.read_table(store, f) for f in paths] + [newest]
    rows = pl.concat([t.with_columns(order=pl.lit(i)) for i, t in enumerate(tables)], how="vertical_relaxed")
    return rows.sort("entity", "order").unique("entity", keep="last", maintain_order=True).drop("order")


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
