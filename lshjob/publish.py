"""Publish stage: verified representative pairs -> the neighbour index, written atomically.

Output contract of :func:`neighbour_table`: one row per (entity, neighbour), both
directions, at most ``top_k`` per entity: ``entity``, ``neighbour`` (keys), ``jaccard``
(exact), ``estimate`` (signature agreement), ``bands_shared`` Int32, ``rank`` UInt32
(1 = most similar; ties broken by neighbour key ascending). Sorted by (entity, rank).

Groups of identical sets are expanded here: members of one group are each other's
neighbours with Jaccard 1, and a member inherits its representative's verified pairs
(same set, same signature, same Jaccard). Only the first top_k + 1 members of a group (in
key order) are ever expanded as neighbours, so a group of a million identical sets costs
a million x top_k rows, not a million squared.

:func:`publish_index` writes ``neighbours.parquet`` and then ``manifest.json`` (which
records the sha256 of the neighbours file) into the output folder by atomic renames from
a staging folder inside it. Until the renames the previous index is untouched; the
previous files are kept in ``previous/`` by hard links, itself built in the staging folder
and renamed into place. One run at a time publishes into a folder (its lock,
:mod:`lshjob.folder_lock`, is held by the caller).
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
from pathlib import Path

import numpy as np
import polars as pl

NEIGHBOURS = "neighbours.parquet"
MANIFEST = "manifest.json"
PREVIOUS = "previous"


def neighbour_table(
    verified: pl.DataFrame,
    rep_of: np.ndarray,
    keys: pl.Series,
    top_k: int,
    bands: int,
) -> pl.DataFrame:
    """Expand representative pairs to entities, rank and cut at top_k (module contract)."""
    cap = top_k + 1
    # Only entities of a verified pair or of a group of identical sets can have neighbours.
    involved = np.bincount(rep_of, minlength=len(rep_of)) > 1
    involved[verified["left_rep"].to_numpy()] = True
    involved[verified["right_rep"].to_numpy()] = True
    ids = np.flatnonzero(involved[rep_of])
    members = pl.DataFrame({"id": ids.astype(np.int64), "rep": rep_of[ids].astype(np.int64)})
    group_size = members.group_by("rep").len()
    head = members.with_columns(pos=pl.int_range(pl.len()).over("rep")).filter(pl.col("pos") < cap)

    edges = pl.concat(
        [
            verified.select(pl.col("left_rep").alias("src"), pl.col("right_rep").alias("dst"),
                            "jaccard", "estimate", "bands_shared"),
            verified.select(pl.col("right_rep").alias("src"), pl.col("left_rep").alias("dst"),
                            "jaccard", "estimate", "bands_shared"),
        ]
    )
    inter = edges.join(head.select(pl.col("rep").alias("dst"), pl.col("id").alias("neighbour")), on="dst")
    inter = inter.select("src", "neighbour", "jaccard", "estimate", "bands_shared")
    multi = group_size.filter(pl.col("len") > 1).select(pl.col("rep").alias("src"))
    intra = multi.join(head.select(pl.col("rep").alias("src"), pl.col("id").alias("neighbour")), on="src").select(
        "src",
        "neighbour",
        pl.lit(1.0).alias("jaccard"),
        pl.lit(1.0).alias("estimate"),
        pl.lit(bands, dtype=pl.Int32).alias("bands_shared"),
    )
    per_group = (
        pl.concat([intra, inter.with_columns(pl.col("bands_shared").cast(pl.Int32))])
        .sort(["src", "jaccard", "neighbour"], descending=[False, True, False])
        .group_by("src", maintain_order=True)
        .head(cap)
    )
    table = (
        members.join(per_group, left_on="rep", right_on="src")
        .filter(pl.col("id") != pl.col("neighbour"))
        .sort(["id", "jaccard", "neighbour"], descending=[False, True, False])
        .group_by("id", maintain_order=True)
        .head(top_k)
        .with_columns(rank=(pl.int_range(pl.len()).over("id") + 1).cast(pl.UInt32))
    )
    return table.select(
        keys.gather(table["id"].to_numpy()).alias("entity"),
        keys.gather(table["neighbour"].to_numpy()).alias("neighbour"),
        "jaccard",
        "estimate",
        "bands_shared",
        "rank",
    )


def sha256_file(path: Path, chunk: int = 1 << 22) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def publish_index(out_dir: Path, neighbours: pl.DataFrame, manifest: dict) -> dict:
    """Write the index into ``out_dir`` atomically (see module docstring); return file facts."""
    out_dir.mkdir(parents=True, exist_ok=True)
    staging = out_dir / f".staging-{os.getpid()}"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    try:
        neighbours.write_parquet(staging / NEIGHBOURS, compression="zstd")
        facts = {
            "neighbours": NEIGHBOURS,
            "rows": neighbours.height,
            "sha256": sha256_file(staging / NEIGHBOURS),
            "bytes": (staging / NEIGHBOURS).stat().st_size,
        }
        manifest = dict(manifest, output=facts)
        (staging / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n")
        if (out_dir / MANIFEST).exists() and (out_dir / NEIGHBOURS).exists():
            _keep_previous(out_dir, staging)
        os.replace(staging / NEIGHBOURS, out_dir / NEIGHBOURS)
        os.replace(staging / MANIFEST, out_dir / MANIFEST)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return facts


def _keep_previous(out_dir: Path, staging: Path) -> None:
    """Make ``previous/`` hard links to the index in place. Built whole in the staging folder,
    then two renames: the old ``previous/`` into the staging folder (removed with it), the new
    one into place (again if a folder came there in between). Between the renames there is no
    ``previous/``, while the index in place is still whole."""
    fresh = staging / PREVIOUS
    fresh.mkdir()
    for name in (NEIGHBOURS, MANIFEST):
        os.link(out_dir / name, fresh / name)
    for attempt in range(8):  # one attempt under the folder's lock; more only for a writer without it
        try:
            os.rename(out_dir / PREVIOUS, staging / f"replaced-previous-{attempt}")
        except FileNotFoundError:
            pass
        try:
            os.rename(fresh, out_dir / PREVIOUS)
            return
        except OSError as exc:  # a folder put there in between (ENOTEMPTY, EEXIST): move it too
            if exc.errno not in (errno.ENOTEMPTY, errno.EEXIST) or attempt == 7:
                raise


def read_manifest(out_dir: Path) -> dict:
    from .errors import InputError

    path = Path(out_dir) / MANIFEST
    if not path.is_file():
        raise InputError(f"{out_dir}: no {MANIFEST}; is this an lshjob index folder?")
    try:  # what lshjob audit reads
        manifest = json.loads(path.read_text())
        manifest["spec"], manifest["plan"], manifest["options"]["threshold"], manifest["options"]["top_k"]
        manifest["inputs"]["source"]
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno}, column {exc.colno}); "
                         "the file is cut short or damaged; run lshjob run again") from None
    except (KeyError, TypeError) as exc:
        what = f"no {exc} entry" if isinstance(exc, KeyError) else "an entry is not a JSON object"
        raise InputError(f"{path}: not an lshjob manifest ({what}); run lshjob run again") from None
    return manifest
