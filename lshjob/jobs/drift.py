"""``lshjob drift``: per entity (and segment) and period, how much its set changed against its
own recent history, from a signature file signed with ``--period``; the rows the rule flags.

The keys are read first (they are checked to be sorted and unique, as ``sign`` and ``merge``
write them), then the signatures a block of whole entities at a time, so memory holds one
block of signatures (about :data:`BLOCK_ROWS` rows) and the per-row figures, never the file.
Estimators and their errors: :mod:`lshjob.drift.estimators`; the rule: :mod:`lshjob.drift.rule`.

Output (``--out``, Parquet, written under a temporary name and renamed into place), one row
per signature row, in key order: the key columns, ``set_size``, ``compared_with`` (the
earlier period compared with; null for an entity's first period in the history window),
``history_periods``, ``similarity`` and ``similarity_se``, ``containment``,
``containment_se`` and ``containment_positions``, ``score``, ``flagged``; with ``--neighbours``
``list_change``; with ``--store`` ``similarity_exact``, ``containment_exact``, ``entered`` and
``left`` (flagged rows the store can check; null elsewhere).
"""

from __future__ import annotations

import datetime as dt
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.atomic import write_table
from lshjob.drift import DEFAULT_Z, MIN_POPULATION, compare_with_history, ratio_and_error, score_rows
from lshjob.drift.exact import check_flagged, store_spec
from lshjob.errors import InputError, ParameterError
from lshjob.runtime.budget import peak_bytes
from lshjob.runtime.outputs import output_file
from lshjob.sign.signatures import signature_array, signature_meta

BLOCK_ROWS = 1 << 18  # signature rows in memory at once: 256 MiB of uint64 at k=128
DEFAULT_HISTORY = 3
OUTPUT_COLUMNS = ("set_size", "compared_with", "history_periods", "similarity", "similarity_se",
                  "containment", "containment_se", "containment_positions", "score", "flagged")


def drift_file(source: str | Path, out: str | Path, history: int = DEFAULT_HISTORY, z: float = DEFAULT_Z,
               block_rows: int = BLOCK_ROWS, neighbours: str | Path | None = None,
               store: str | Path | None = None) -> tuple[pl.DataFrame, dict]:
    """Compare every row of the signature file ``source`` with its entity's last ``history``
    periods, score and flag them (rule: :mod:`lshjob.drift.rule`), write ``out``; return the
    rows and the summary. ``neighbours``: a table written by ``lshjob diff --out``; its
    ``list_change`` per entity is added as a second signal (:func:`neighbour_drift`).
    ``store``: a store written by ``lshjob refresh``; the flagged rows get the elements that
    entered and left and their exact similarity and containment (:mod:`lshjob.drift.exact`),
    and without ``neighbours`` the second signal is the diff of its last two index versions."""
    if not 1 <= history <= 1000:
        raise ParameterError(f"--history must be from 1 to 1000 periods; got {history}")
    if not 0 < z < 100:
        raise ParameterError(f"--z must be in (0, 100); got {z}")
    out = output_file(out, [source] + ([neighbours] if neighbours else []), "drift")
    changes = read_list_changes(neighbours) if neighbours is not None else None
    if changes is None and store is not None:  # the store's last two published versions, diffed
        changes, neighbours = store_list_changes(Path(store))
    started = time.perf_counter()
    meta = signature_meta(source)
    keys = list(meta.get("keys") or [])
    if "period" not in keys:
        raise InputError(f"{source}: no 'period' key column (keys are {', '.join(keys) or 'none'}); "
                         "drift needs a file signed with --period (lshjob sign ... --time C --period month)")
    stored = store_spec(store, meta.get("period_unit"), keys) if store is not None else None
    table = pl.read_parquet(source, columns=[*keys, "set_size"])
    if table.height == 0:
        raise InputError(f"{source}: no signature rows; nothing to compare")
    group_keys = [c for c in keys if c != "period"]
    starts = _check_sorted(table, group_keys, source)
    index = period_numbers(table["period"], meta.get("period_unit"))

    n, k = table.height, int(meta["k"])
    results = [np.empty(n, dtype=np.int64)] + [np.zeros(n, dtype=np.int32) for _ in range(5)]
    bounds = _blocks(starts, n, block_rows)
    frame = pl.scan_parquet(source).select("signature")
    for lo, hi in bounds:
        matrix = signature_array(frame.slice(lo, hi - lo).collect(), k)
        local = starts[(starts >= lo) & (starts < hi)] - lo
        parts = compare_with_history(matrix, np.append(local, hi - lo).astype(np.int64), index[lo:hi], history)
        del matrix
        for whole, part in zip(results, parts):
            whole[lo:hi] = part
        results[0][lo:hi] = np.where(parts[0] >= 0, parts[0] + lo, -1)
    previous, sim_equal, sim_used, cont_equal, cont_below, periods = results
    similarity, similarity_se = ratio_and_error(sim_equal, sim_used)
    containment, containment_se = ratio_and_error(cont_equal, cont_below)
    compared = previous >= 0
    compared_with = table["period"].gather(np.where(compared, previous, 0))
    rows = table.with_columns(
        compared_with=_masked(compared_with, compared),
        history_periods=pl.Series(periods, dtype=pl.UInt16),
        similarity=_masked(similarity, compared), similarity_se=_masked(similarity_se, compared),
        containment=_masked(containment, compared), containment_se=_masked(containment_se, compared),
        containment_positions=pl.Series(cont_below, dtype=pl.UInt32),
    )
    rows, per_period = score_rows(rows, z)
    rows = rows.select(*keys, *OUTPUT_COLUMNS)
    if changes is not None:
        rows = neighbour_drift(rows, changes)
    checked = None
    if stored is not None:
        rows, checked = check_flagged(store, rows, history, meta["period_unit"], k, *stored)
    write_table(rows, out)
    summary = drift_summary(rows, per_period, source, out, meta, history, z)
    if changes is not None:
        summary["neighbour_drift"] = neighbour_summary(rows, changes, neighbours)
    if checked is not None:
        summary["exact"] = checked
        summary["warnings"] += checked.pop("warnings")
    summary["seconds"] = round(time.perf_counter() - started, 3)
    summary["peak_memory_bytes"] = peak_bytes()
    return rows, summary


def _masked(values, compared: np.ndarray) -> pl.Series:
    """``values`` (floats or a Series) with nulls where nothing was compared."""
    series = values if isinstance(values, pl.Series) else pl.Series(values, dtype=pl.Float64)
    return pl.select(pl.when(pl.lit(pl.Series(compared))).then(pl.lit(series))).to_series()


def period_numbers(periods: pl.Series, unit: str | None) -> np.ndarray:
    """A calendar number per period, consecutive periods one apart: months as year * 12 +
    month, weeks and days by days since 1970 (divided by 7 for weeks); for a file without a
    recorded unit, the rank among the file's distinct periods."""
    dates = periods.cast(pl.Date)
    if unit == "month":
        return (dates.dt.year().cast(pl.Int64) * 12 + dates.dt.month().cast(pl.Int64)).to_numpy()
    days = dates.cast(pl.Int64).to_numpy()
    if unit == "week":
        return days // 7
    if unit == "day":
        return days
    return dates.rank("dense").cast(pl.Int64).to_numpy()


def _check_sorted(table: pl.DataFrame, group_keys: list[str], source) -> np.ndarray:
    """The first row of each group (entity, [segment]); refuse rows out of key order or repeated."""
    behind = pl.lit(False)
    same = pl.lit(True)
    for column in group_keys:
        prev = pl.col(column).shift(1)
        behind = behind | (same & (pl.col(column) < prev))
        same = same & (pl.col(column) == prev)
    new_group = ~same.fill_null(False)
    behind = behind.fill_null(False) | (~new_group & (pl.col("period") <= pl.col("period").shift(1))).fill_null(False)
    flags = table.select(new=new_group, bad=behind)
    bad = flags["bad"].arg_true()
    if len(bad):
        row = table.row(int(bad[0]), named=True)
        where = ", ".join(f"{c} {row[c]}" for c in [*group_keys, "period"])
        raise InputError(f"{source}: rows are not sorted by {', '.join(group_keys)}, period (row {int(bad[0])}: "
                         f"{where}); lshjob sign and merge write them sorted: sign or merge the file again")
    starts = flags["new"].arg_true().to_numpy().astype(np.int64)
    return starts if len(starts) and starts[0] == 0 else np.insert(starts, 0, 0)


def _blocks(starts: np.ndarray, n: int, block_rows: int) -> list[tuple[int, int]]:
    """Row ranges of about ``block_rows`` rows each, cut at group starts only."""
    bounds, lo = [], 0
    while lo < n:
        if n - lo <= block_rows:
            hi = n
        else:
            hi = int(starts[np.searchsorted(starts, lo + block_rows, side="right") - 1])
            if hi <= lo:  # one group longer than a block: take it whole
                after = int(np.searchsorted(starts, lo, side="right"))
                hi = int(starts[after]) if after < len(starts) else n
        bounds.append((lo, hi))
        lo = hi
    return bounds


def drift_summary(rows: pl.DataFrame, per_period: pl.DataFrame, source, out, meta: dict, history: int,
                  z: float) -> dict:
    compared = rows.filter(pl.col("containment").is_not_null())
    scheme = meta["scheme"]
    return {
        "signatures": str(source), "out": str(out), "rows": rows.height,
        "entities": rows["entity"].n_unique(), "entities_compared": compared["entity"].n_unique(),
        "rows_compared": compared.height, "flagged": int(rows["flagged"].sum()),
        "entities_flagged": rows.filter("flagged")["entity"].n_unique(),
        "history": history, "z": z, "min_population": MIN_POPULATION,
        "scheme": scheme, "k": int(meta["k"]), "period_unit": meta.get("period_unit"),
        "estimators": {
            "similarity": "fraction of equal signature positions (Broder 1997"
                          + ("; Li, Owen and Zhang 2012 without densification)" if scheme == "oph" else ")"),
            "containment": "equal positions / positions where the period's value is at most the history's "
                           "(the history's signature: element-wise minimum of its periods')",
            "standard_error": "binomial sqrt(p(1-p)/positions)"
                              + (" (an upper estimate for oph)" if scheme == "oph" else ""),
        },
        "periods": [
            {"period": _iso(r["period"]), "compared": r["compared"], "scored": r["scored"], "flagged": r["flagged"],
             "median_similarity": r["median_similarity"], "median_containment": r["median_containment"],
             "typical_containment": r["typical_containment"]}
            for r in per_period.iter_rows(named=True)
        ],
        "warnings": [f"period {_iso(r['period'])}: {r['compared']} rows compared, "
                     f"fewer than {MIN_POPULATION}; not scored"
                     for r in per_period.iter_rows(named=True) if 0 < r["compared"] < MIN_POPULATION],
    }


def store_list_changes(store: Path) -> tuple[pl.DataFrame | None, str | None]:
    """``entity``, ``list_change`` between the last two index versions a refresh store keeps
    (``lshjob diff`` of them, :func:`lshjob.jobs.diff.diff_indexes`), and what was compared;
    (None, None) when it keeps fewer than two (``lshjob refresh --keep``)."""
    from lshjob.jobs.diff import diff_indexes
    from lshjob.store import catalog
    from lshjob.store import files as store_files

    versions = catalog.read_state(store).versions if (store / catalog.CATALOG).is_file() else []
    if len(versions) < 2:
        return None, None
    old, new = (store / store_files.VERSIONS / v.folder for v in versions[-2:])
    with tempfile.TemporaryDirectory(prefix="lshjob-drift-") as work:
        diff_indexes(old, new, Path(work) / "changes.parquet")
        changes = read_list_changes(Path(work) / "changes.parquet")
    return changes, f"{store}: versions {versions[-2].run_id} -> {versions[-1].run_id}"


def read_list_changes(path: str | Path) -> pl.DataFrame:
    """``entity``, ``list_change`` of a ``lshjob diff --out`` table; one-line errors."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such file (expected a table written by lshjob diff --out)")
    try:
        schema = pl.read_parquet_schema(path)
    except Exception as exc:  # noqa: BLE001 - any unreadable file is bad input
        raise InputError(f"{path}: not a Parquet file ({exc})") from None
    missing = [c for c in ("entity", "list_change") if c not in schema]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' not found; columns are: {', '.join(schema)} "
                         "(expected a table written by lshjob diff --out)")
    return pl.read_parquet(path, columns=["entity", "list_change"])


def neighbour_drift(rows: pl.DataFrame, changes: pl.DataFrame) -> pl.DataFrame:
    """``rows`` with the entity's ``list_change`` between two index versions (null: its
    neighbour list did not change, or it is in neither index)."""
    if changes.schema["entity"] != rows.schema["entity"]:
        changes = changes.with_columns(pl.col("entity").cast(rows.schema["entity"], strict=False))
    return rows.join(changes, on="entity", how="left", maintain_order="left")


def neighbour_summary(rows: pl.DataFrame, changes: pl.DataFrame, source) -> dict:
    """Both signals side by side: entities whose neighbour list changed, how many of them
    the drift rule flags in the latest period or any, the most changed (with whether they are
    flagged) and the most flagged (with their neighbour-list change; null: unchanged)."""
    latest = rows["period"].max()
    flagged_any = set(rows.filter("flagged")["entity"].to_list())
    flagged_latest = set(rows.filter(pl.col("flagged") & (pl.col("period") == latest))["entity"].to_list())
    most = changes.sort(["list_change", "entity"], descending=[True, False]).head(10)
    strongest = (rows.filter("flagged").group_by("entity").agg(pl.col("score").max(), pl.col("list_change").first())
                 .sort(["score", "entity"], descending=[True, False]).head(10))
    return {
        "source": str(source), "entities_list_changed": changes.height,
        "also_flagged_latest_period": len(flagged_latest & set(changes["entity"].to_list())),
        "also_flagged_any_period": len(flagged_any & set(changes["entity"].to_list())),
        "most_changed": [{"entity": e, "list_change": c, "flagged_latest": e in flagged_latest,
                          "flagged_any": e in flagged_any} for e, c in most.iter_rows()],
        "most_flagged": [{"entity": e, "score": sc, "list_change": c} for e, sc, c in strongest.iter_rows()],
    }


def _iso(value) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)
