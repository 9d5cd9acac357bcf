"""Flagged rows checked against the exact sets of the refresh store (:mod:`lshjob.store`).

For each flagged row (an entity's set A_t in period t, compared with its set A_p of period
``compared_with`` and with the history H, the union of its sets in the ``history`` periods
before t) the store's per-period sets give, by set operations:

* ``entered`` = A_t - A_p and ``left`` = A_p - A_t (the elements, sorted);
* ``similarity_exact`` = |A_t and A_p| / |A_t or A_p| and ``containment_exact`` =
  |A_t and H| / |A_t|, beside the estimates;
* whether each estimate is within the stated error of the exact value: 3 binomial standard
  errors sqrt(p (1 - p) / positions) at the exact p (:mod:`lshjob.drift.estimators`), or equal.

The store keeps one set per entity and period (no segments) and only the periods of its
window: a row whose period, compared period or a history period with a signature row is not
in the store is counted as not checked, never checked against part of its history. A row
whose store set is not of the signature's ``set_size`` was signed from other events (or
another element column) than the store holds: counted and named in a warning.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import polars as pl

from lshjob.errors import InputError, ParameterError
from lshjob.store import catalog
from lshjob.store import files as store_files

LISTED = 20  # flagged rows listed in the summary, by score
ELEMENTS_LISTED = 10  # entered and left elements listed per row in the summary
ERROR_UNITS = 3.0
OFFSET = {"day": "d", "week": "w", "month": "mo"}
EXACT_COLUMNS = ("similarity_exact", "containment_exact", "entered", "left")


def store_spec(store: str | Path, period_unit: str | None, keys: list[str]) -> tuple[catalog.State, dict]:
    """The store's state and the spec it was made with; refuse a store that cannot check
    these signatures (no catalog, no periods, other period unit, segments)."""
    store = Path(store)
    if not (store / catalog.CATALOG).is_file():
        raise InputError(f"--store {store}: no {catalog.CATALOG}; is this a store made by lshjob refresh?")
    state = catalog.read_state(store)
    if not state.periods:
        raise InputError(f"--store {store}: the store holds no period yet")
    if "segment" in keys:
        raise ParameterError(f"--store {store}: the store keeps one set per entity and period, not per segment; "
                             "sign without --segment to check against it")
    unit = state.facts.get("period")
    if unit != period_unit:
        raise ParameterError(f"--store {store} keeps {unit} periods; the signatures are per {period_unit or 'no unit'}")
    return state, json.loads(state.facts.get("spec") or "{}")


def check_flagged(store: str | Path, rows: pl.DataFrame, history: int, period_unit: str, k: int,
                  state: catalog.State, spec: dict) -> tuple[pl.DataFrame, dict]:
    """``rows`` (drift's output: entity, period, compared_with, set_size, similarity,
    containment, containment_positions, score, flagged) with :data:`EXACT_COLUMNS` for the
    flagged rows the store can check (nulls elsewhere), and the summary of the check."""
    store = Path(store)
    held = {p.period: p.sets_file for p in state.periods}
    flagged = rows.filter("flagged").select("entity", "period", "compared_with", "set_size", "similarity",
                                            "containment", "containment_positions", "score")
    first = pl.col("period").dt.offset_by(f"-{history}{OFFSET[period_unit]}")
    wanted = (flagged.select("entity", "period", first=first)
              .join(rows.select("entity", other="period"), on="entity")
              .filter((pl.col("other") >= pl.col("first")) & (pl.col("other") <= pl.col("period"))))
    needed = sorted(set(wanted["other"].to_list()) & set(held))
    sets, element = _read_sets(store, held, needed, flagged["entity"].unique(), rows.schema["entity"])
    by_row = {key: group for key, group in wanted.group_by("entity", "period")}

    checked, missing, size_differs, within = [], 0, 0, {"similarity": 0, "containment": 0}
    exact = {c: [] for c in EXACT_COLUMNS}
    for row in flagged.iter_rows(named=True):
        periods = by_row[(row["entity"], row["period"])]["other"].to_list()
        if any(p not in held for p in periods):
            missing += 1
            for c in EXACT_COLUMNS:
                exact[c].append(None)
            continue
        entity = row["entity"]
        now = sets.get((entity, row["period"]), set())
        before = sets.get((entity, row["compared_with"]), set())
        past = set().union(*(sets.get((entity, p), set()) for p in periods if p != row["period"]))
        size_differs += len(now) != row["set_size"]
        sim = len(now & before) / len(now | before) if now | before else None
        cont = len(now & past) / len(now) if now else None
        entered, left = sorted(now - before), sorted(before - now)
        for c, v in zip(EXACT_COLUMNS, (sim, cont, entered, left)):
            exact[c].append(v)
        within["similarity"] += _within(row["similarity"], sim, k)
        within["containment"] += _within(row["containment"], cont, row["containment_positions"])
        checked.append({**{c: row[c] for c in ("entity", "period", "compared_with", "score")},
                        "similarity": row["similarity"], "similarity_exact": sim,
                        "containment": row["containment"], "containment_exact": cont,
                        "entered_count": len(entered), "left_count": len(left),
                        "entered": entered[:ELEMENTS_LISTED], "left": left[:ELEMENTS_LISTED]})
    columns = flagged.select("entity", "period").with_columns(
        similarity_exact=pl.Series(exact["similarity_exact"], dtype=pl.Float64),
        containment_exact=pl.Series(exact["containment_exact"], dtype=pl.Float64),
        entered=pl.Series(exact["entered"], dtype=pl.List(element)),
        left=pl.Series(exact["left"], dtype=pl.List(element)))
    out = rows.join(columns, on=["entity", "period"], how="left", maintain_order="left")
    checked.sort(key=lambda r: -r["score"])
    summary = {
        "store": str(store), "element": spec.get("element"), "flagged_rows": flagged.height,
        "checked": len(checked), "not_in_store": missing, "set_size_differs": size_differs,
        "within_error": within, "error_bound": f"{ERROR_UNITS:g} binomial standard errors at the exact value",
        "compared": "entered and left: against the period compared with (compared_with); containment_exact: "
                    "in the union of the history periods",
        "rows": [{**r, "period": _iso(r["period"]), "compared_with": _iso(r["compared_with"])}
                 for r in checked[:LISTED]],
        "warnings": [],
    }
    if missing:
        summary["warnings"].append(f"--store: {missing} flagged rows not checked: their periods are not all in the "
                                   f"store's window ({_iso(min(held))} to {_iso(max(held))})")
    if size_differs:
        summary["warnings"].append(f"--store: {size_differs} of {len(checked)} checked sets differ in size from the "
                                   f"signatures' set_size: the store holds element {spec.get('element')!r} of "
                                   "other events than the signatures were made from")
    return out, summary


def _read_sets(store: Path, held: dict, periods: list[dt.date], entities: pl.Series,
               entity_type) -> tuple[dict, pl.DataType]:
    """{(entity, period): set of elements} of ``entities`` in ``periods`` (the store's files),
    and the elements' type."""
    found: dict = {}
    element = pl.String
    wanted = entities.implode()
    for period in periods:
        table = (store_files.scan_tables(store, [held[period]])
                 .with_columns(pl.col("entity").cast(entity_type, strict=False))
                 .filter(pl.col("entity").is_in(wanted)).collect())
        element = table.schema["element"]
        for entity, elements in table.group_by("entity").agg("element").iter_rows():
            found[(entity, period)] = set(elements)
    return found, element


def _within(estimate: float | None, exact: float | None, positions: int) -> bool:
    if estimate is None or exact is None:
        return False
    bound = ERROR_UNITS * (exact * (1.0 - exact) / max(1, positions)) ** 0.5
    return abs(estimate - exact) <= bound + 1e-12


def _iso(value) -> str | None:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else value
