"""``lshjob diff``: what changed between two versions of a neighbour index.

Pairs are compared unordered: the index lists a pair in one or both directions (each entity
keeps its own top-k), and ``{a, b}`` counts once whichever it is. Over the union of the two
versions' unordered pairs:

* ``pairs_added``: in the new index only; ``pairs_removed``: in the old one only;
* ``pairs_jaccard_changed``: in both, with a different exact Jaccard (the sets changed);
* ``churn_rate`` = (added + removed) / pairs in either version (0: the same pairs; 1: none
  kept).

Per entity (in either version), its top-k list before and after: ``entered`` and ``left``
(neighbours new to, or gone from, its list), ``kept``, and ``list_change`` = 1 - |old and
new| / |old or new| (the Jaccard distance of the two lists: 0 the same neighbours, 1 none in
common). An entity without neighbours in one version has ``list_change`` 1 (0 when it has
none in either: it is not listed).

The per-entity table (``--out``) holds the entities whose list changed, most changed first
(ties by entity); it is written under a temporary name and renamed into place.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from lshjob.core.atomic import write_table
from lshjob.errors import InputError
from lshjob.index.publish import NEIGHBOURS, open_index
from lshjob.runtime.outputs import output_file
from lshjob.runtime.remote import local_or_none, refuse_uri

PAIR_COLUMNS = ("entity", "neighbour", "jaccard")
TOP_ENTITIES = 10  # most changed entities named in the summary

ENTITY_CHANGES = {  # the --out table
    "entity": None, "old_neighbours": pl.UInt32, "new_neighbours": pl.UInt32, "entered": pl.UInt32,
    "left": pl.UInt32, "kept": pl.UInt32, "list_change": pl.Float64,
}


def read_index(folder: str | Path) -> tuple[pl.DataFrame, dict]:
    """(entity, neighbour, jaccard) rows of an index folder and its manifest; one-line errors
    for a folder that is not an index."""
    refuse_uri(folder, "diff")
    manifest, path = open_index(local_or_none(folder) or folder)
    try:
        schema = pl.read_parquet_schema(path)
    except Exception as exc:
        raise InputError(f"{path}: not a Parquet file ({exc})") from None
    missing = [c for c in PAIR_COLUMNS if c not in schema]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' not found; columns are: {', '.join(schema)}")
    return pl.read_parquet(path, columns=list(PAIR_COLUMNS)), manifest


def unordered_pairs(rows: pl.DataFrame) -> pl.DataFrame:
    """One row per unordered pair: ``a`` < ``b`` and its Jaccard (both directions carry the
    same exact value; the first is kept)."""
    first = pl.col("entity") < pl.col("neighbour")
    lo = pl.when(first).then("entity").otherwise("neighbour")
    hi = pl.when(first).then("neighbour").otherwise("entity")
    return (rows.select(a=lo, b=hi, jaccard="jaccard")
            .unique(subset=["a", "b"], keep="first", maintain_order=True))


def diff_indexes(old: str | Path, new: str | Path, out: str | Path | None = None) -> dict:
    """Compare two index folders; return the summary (module docstring) and write the
    per-entity changes to ``out`` when given."""
    if out is not None:
        out = output_file(out, [Path(old) / NEIGHBOURS, Path(new) / NEIGHBOURS], "diff")
    old_rows, old_manifest = read_index(old)
    new_rows, new_manifest = read_index(new)
    old_type, new_type = old_rows.schema["entity"], new_rows.schema["entity"]
    if old_type != new_type and not (old_type.is_integer() and new_type.is_integer()):
        raise InputError(f"{Path(new) / NEIGHBOURS}: column 'entity' is {new_type}, but in "
                         f"{Path(old) / NEIGHBOURS} it is {old_type}; indexes of different keys cannot be compared")
    if old_type != new_type:  # both whole numbers
        old_rows = old_rows.with_columns(pl.col("entity", "neighbour").cast(pl.Int64))
        new_rows = new_rows.with_columns(pl.col("entity", "neighbour").cast(pl.Int64))

    a, b = unordered_pairs(old_rows), unordered_pairs(new_rows)
    both = a.join(b, on=["a", "b"], how="inner", suffix="_new")
    added = b.height - both.height
    removed = a.height - both.height
    changed = both.filter(pl.col("jaccard") != pl.col("jaccard_new")).height
    either = a.height + b.height - both.height

    entities = entity_changes(old_rows, new_rows)
    if out is not None:
        write_table(entities, out)
    warnings = []
    for name in ("threshold", "top_k"):
        before, after = old_manifest.options.get(name), new_manifest.options.get(name)
        if before != after:
            warnings.append(f"--{name.replace('_', '-')} differs ({before} in {old}, {after} in {new}): "
                            "part of the change comes from the options, not the data")
    listed = set(old_rows["entity"].unique().to_list()) | set(new_rows["entity"].unique().to_list())
    return {
        "old": str(old), "new": str(new),
        "pairs_old": a.height, "pairs_new": b.height,
        "pairs_added": added, "pairs_removed": removed, "pairs_kept": both.height,
        "pairs_jaccard_changed": changed,
        "churn_rate": (added + removed) / either if either else 0.0,
        "entities_listed": len(listed),
        "entities_changed": entities.height,
        "entities_changed_rate": entities.height / len(listed) if listed else 0.0,
        "most_changed": entities.head(TOP_ENTITIES).to_dicts(),
        "out": None if out is None else str(out),
        "warnings": warnings,
    }


def entity_changes(old_rows: pl.DataFrame, new_rows: pl.DataFrame) -> pl.DataFrame:
    """Per entity whose top-k list differs between the versions: counts and ``list_change``,
    most changed first (module docstring)."""
    old_lists = old_rows.select("entity", "neighbour").with_columns(in_old=pl.lit(True))
    new_lists = new_rows.select("entity", "neighbour").with_columns(in_new=pl.lit(True))
    joined = old_lists.join(new_lists, on=["entity", "neighbour"], how="full", coalesce=True)
    per = joined.group_by("entity").agg(
        old_neighbours=pl.col("in_old").sum().cast(pl.UInt32),
        new_neighbours=pl.col("in_new").sum().cast(pl.UInt32),
        entered=(pl.col("in_new") & pl.col("in_old").is_null()).sum().cast(pl.UInt32),
        left=(pl.col("in_old") & pl.col("in_new").is_null()).sum().cast(pl.UInt32),
        kept=(pl.col("in_old") & pl.col("in_new")).sum().cast(pl.UInt32),
        listed=pl.len(),
    )
    return (per.filter((pl.col("entered") + pl.col("left")) > 0)
            .with_columns(list_change=1.0 - pl.col("kept") / pl.col("listed"))
            .drop("listed")
            .sort(["list_change", "entity"], descending=[True, False]))
