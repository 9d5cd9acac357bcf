"""Publish stage: verified representative pairs -> the neighbour index, written atomically.

Output: the NEIGHBOURS table (:mod:`lshjob.contracts.tables`; :func:`neighbour_blocks`,
concatenated): one row per (entity, neighbour), at most ``top_k`` per entity, ranked by
Jaccard (1 = most similar; ties broken by neighbour key ascending), sorted by (entity, rank);
both directions unless the neighbour's own list is full. No pair at all gives a file with
these columns and no row.

Groups of identical sets are expanded here: members of one group are each other's
neighbours with Jaccard 1, and a member inherits its representative's verified pairs
(same set, same signature, same Jaccard). Only the first top_k + 1 members of a group (in
key order) are ever expanded as neighbours, so a group of a million identical sets costs
a million x top_k rows, not a million squared. A group of m identical sets with
top_k >= m - 1 still publishes m(m - 1) rows: that is the index asked for, so its size is
counted before anything is expanded (:func:`expand`, :func:`check_output`) and a run whose
index would not fit the memory budget is refused with the figures.

Each representative's list is ranked as it is made, straight from the verified pairs and
the groups' first members (:func:`lshjob.index._ranking.ranked_lists`): the rows a pair
brings before the cut are never held, only the lists (at most top_k + 1 rows a
representative) and the pairs laid out by either side with their values (48 bytes a pair,
beside the 36 of the verified pairs verification handed on). The rows are made a block of
entities at a time (an eighth of the budget in flight, or a quarter of what it leaves
beside the process, :func:`block_rows`) and streamed into the Parquet file, so publishing
holds the table's size only when it fits a block.

:func:`stage_neighbours` writes ``neighbours.parquet`` in a staging folder inside the output
folder; :func:`commit_index` writes ``manifest.json`` beside it (the manifest records the
neighbours file's sha256) and renames both into place, the neighbours first. Until the
renames the previous index is untouched; the previous files are kept in ``previous/`` by
hard links, built in the staging folder and
renamed into place. One run at a time publishes into a folder (its lock,
:mod:`lshjob.runtime.folder_lock`, is held by the caller).
"""

from __future__ import annotations

import errno
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
from polars.io.plugins import register_io_source

from lshjob.contracts.manifest import Manifest
from lshjob.contracts.manifest import read_manifest as read_manifest_file
from lshjob.contracts.tables import NEIGHBOURS as NEIGHBOUR_ROWS
from lshjob.core.atomic import file_sha256
from lshjob.errors import InputError, ParameterError
from lshjob.index._ranking import member_rows, ranked_lists

NEIGHBOURS = "neighbours.parquet"
MANIFEST = "manifest.json"
PREVIOUS = "previous"
METADATA_KEY = "lshjob"
FORMAT_VERSION = 1
VALUE_BYTES = 24  # jaccard, estimate (Float64), bands_shared, rank (32 bits) of a published row
# a block's expanded rows in flight: ids, values, the sort's copy and the keys gathered
# (about 100 bytes a row with integer keys; measured on the memory test of tests/test_publish.py)
BLOCK_BYTES_PER_ROW = 160
MIN_BLOCK_ROWS = 65_536
# zstd at level 1 rather than polars' default 3: on the long-tailed 1M index (20.6M rows) the
# encoding took 1.91 s CPU instead of 2.24 s for a file 3.5% larger (63.6 MB against 61.5 MB;
# bench/RESULTS.md, "Publishing on long-tailed data")
ZSTD_LEVEL = 1


@dataclass
class Expansion:
    """What publishing will expand, counted before anything is: ``members`` (``id``
    ascending, ``rep``, ``rows``: the rows it publishes), each representative's neighbour
    list (``lists``: ``neighbour``, ``jaccard``, ``estimate``, ``bands_shared`` in rank
    order; representative g's list is rows ``list_starts[g]:list_starts[g + 1]``), and the
    exact number of rows the index will hold."""

    members: pl.DataFrame
    lists: pl.DataFrame
    list_starts: np.ndarray
    published_rows: int
    top_k: int


def effective_top_k(top_k: int, entities: int) -> int:
    """An entity has at most entities - 1 neighbours: a larger top-k changes nothing."""
    return max(1, min(top_k, entities - 1))


def row_bytes(keys: pl.Series) -> int:
    """Bytes a published row takes in memory: two keys and the values (text keys: polars'
    16-byte view plus the text when longer than 12 bytes)."""
    if keys.dtype.is_integer() or len(keys) == 0:
        key = 8
    else:
        lengths = keys.str.len_bytes()
        key = 16 + int(lengths.filter(lengths > 12).sum() / len(keys))
    return VALUE_BYTES + 2 * key


def identical_rows(rep_of: np.ndarray, top_k: int) -> tuple[int, int, int]:
    """(rows, groups, largest): the rows groups of identical sets publish among themselves, a
    lower bound of the index's size known right after the collapse."""
    sizes = np.bincount(rep_of, minlength=len(rep_of)).astype(np.int64)
    sizes = sizes[sizes > 1]
    rows = int((sizes * np.minimum(top_k, sizes - 1)).sum())
    return rows, len(sizes), int(sizes.max()) if len(sizes) else 0


def check_output(rows: int, keys: pl.Series, top_k: int, memory: int, largest_group: int = 0) -> None:
    """Refuse an index whose rows would take more than the memory budget (module docstring)."""
    need = rows * row_bytes(keys)
    if need <= memory:
        return
    over = f" over a group of {largest_group} identical sets" if largest_group > 1 else ""
    raise ParameterError(
        f"--top-k {top_k}{over} would publish {rows:.3g} rows (~{need / 2**30:.1f} GiB); the budget is "
        f"{memory / 2**30:.1f} GiB; lower --top-k or raise --memory"
    )


def expand(verified: pl.DataFrame, rep_of: np.ndarray, top_k: int, bands: int) -> Expansion:
    """Each representative's ranked neighbour list and each member's row count (no rows of
    the index are made here). Before its cut at top_k + 1, a representative's list holds
    the first top_k + 1 members of each group it is paired with; the lists are ranked as
    they are made (:func:`lshjob.index._ranking.ranked_lists`), so those rows are never
    held, only the lists."""
    cap = top_k + 1
    sizes = np.bincount(rep_of, minlength=len(rep_of))
    left, right = verified["left_rep"].to_numpy(), verified["right_rep"].to_numpy()
    # Only entities of a verified pair or of a group of identical sets can have neighbours.
    involved = sizes > 1
    involved[left] = True
    involved[right] = True
    ids = np.flatnonzero(involved[rep_of])
    key = np.int32 if len(rep_of) < 2**31 else np.int64  # entity ids, held in the lists: 4 bytes when they fit
    reps = rep_of[ids].astype(key)
    # head: the first cap members of each group, in key order (ids ascending, sorted stably by rep)
    order = np.argsort(reps, kind="stable")
    by_rep = reps[order]
    first = np.searchsorted(by_rep, by_rep)
    keep = order[np.arange(len(order)) - first < cap]
    head_rep, head_id = reps[keep], ids[keep].astype(key)
    head_first = np.searchsorted(head_rep, np.arange(len(rep_of), dtype=key))  # where each group's head begins
    del order, by_rep, first, keep, head_rep
    list_starts, neighbour, jaccard, estimate, bands_shared, own = ranked_lists(
        left, right, verified["jaccard"].to_numpy(), verified["estimate"].to_numpy(),
        verified["bands_shared"].to_numpy(), sizes, head_first, head_id, cap, bands, key)
    del left, right, head_first, head_id
    # rows published for a member: its representative's list, without itself, cut at top_k
    rows = np.minimum(np.diff(list_starts)[reps] - own[ids], top_k).astype(np.int64)
    members = pl.DataFrame({"id": ids.astype(key), "rep": reps, "rows": rows})
    lists = pl.DataFrame({"neighbour": neighbour, "jaccard": jaccard, "estimate": estimate,
                          "bands_shared": bands_shared})
    return Expansion(members, lists, list_starts, int(rows.sum()), top_k)


def neighbour_blocks(expansion: Expansion, keys: pl.Series, block_rows: int):
    """The index's rows (module contract), a block of entities at a time, each block at most
    ``block_rows`` rows (or one entity's list). A member's rows are its representative's
    list, without itself, cut at top_k, made in one compiled pass with the keys
    (:func:`lshjob.index._ranking.member_rows`): no join, no sort."""
    members, lists = expansion.members, expansion.lists
    ids, reps, counts = (members[c].to_numpy() for c in ("id", "rep", "rows"))
    columns = [lists[c].to_numpy() for c in ("neighbour", "jaccard", "estimate", "bands_shared")]
    # integer keys are gathered in the pass; others by polars from the ids the pass gives
    integer = keys.dtype.is_integer()
    source = keys.to_numpy() if integer else np.arange(len(keys), dtype=np.int64)
    cum = np.cumsum(counts)
    start = 0
    while start < members.height:
        base = cum[start - 1] if start else 0
        stop = max(start + 1, int(np.searchsorted(cum, base + block_rows, side="right")))
        entity, neighbour, jaccard, estimate, bands_shared, rank = member_rows(
            ids[start:stop], reps[start:stop], counts[start:stop], expansion.list_starts, *columns, source)
        start = stop
        if integer:
            entity, neighbour = pl.Series(entity, dtype=keys.dtype), pl.Series(neighbour, dtype=keys.dtype)
        else:
            entity, neighbour = keys.gather(entity), keys.gather(neighbour)
        yield pl.DataFrame([entity.alias("entity"), neighbour.alias("neighbour"), pl.Series("jaccard", jaccard),
                            pl.Series("estimate", estimate), pl.Series("bands_shared", bands_shared),
                            pl.Series("rank", rank)])
        del entity, neighbour, jaccard, estimate, bands_shared, rank
    if members.height == 0:
        yield NEIGHBOUR_ROWS.empty(key=keys.dtype)


def block_rows(memory: int, held: int = 0) -> int:
    """Expanded rows a block may hold: about an eighth of the budget, or a quarter of what it
    leaves beside the ``held`` bytes the process holds when that is less (the writer holds
    two blocks while it encodes one)."""
    share = min(memory // 8, (memory - held) // 4)
    return max(MIN_BLOCK_ROWS, share // BLOCK_BYTES_PER_ROW)


def staging_folder(out_dir: Path) -> Path:
    return out_dir / f".staging-{os.getpid()}"


def stage_neighbours(out_dir: Path, tables, metadata: dict) -> dict:
    """Write the index's rows (``tables``: an iterator of blocks in order) into
    ``neighbours.parquet`` of the staging folder, with ``metadata`` as the file's key-value
    record ``lshjob`` (JSON); return the file's facts. One block is written at once; more
    are streamed into the file as they are made (polars' writer pulls them from an IO
    source), so only the block in flight is held."""
    out_dir.mkdir(parents=True, exist_ok=True)
    staging = staging_folder(out_dir)
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    path = staging / NEIGHBOURS
    kv = {METADATA_KEY: json.dumps(metadata, sort_keys=True)}
    pending = iter(tables)
    first = next(pending)
    second = next(pending, None)
    if second is None:
        first.write_parquet(path, compression="zstd", compression_level=ZSTD_LEVEL, metadata=kv)
        rows = first.height
    else:
        rows = stream_parquet(first, second, pending, path, kv)
    return {"neighbours": NEIGHBOURS, "rows": rows, "sha256": file_sha256(path), "bytes": path.stat().st_size}


def stream_parquet(first: pl.DataFrame, second: pl.DataFrame, pending, sink, kv: dict) -> int:
    """Write ``first``, ``second`` and then the tables of the iterator ``pending`` (one schema,
    in order) into ``sink`` (a path or a binary stream) as one Parquet file with the key-value
    metadata ``kv``, a table held at a time; the rows written. An error raised while making
    the tables is raised as it is, not as polars' wrapping of it."""
    held = [second, first]
    schema = first.schema
    rows = [0]
    failure: list[BaseException] = []

    def source(with_columns, predicate, n_rows, batch_size):
        try:
            while held or (table := next(pending, None)) is not None:
                if held:
                    table = held.pop()
                rows[0] += table.height
                yield table
                table = None
        except Exception as exc:
            failure.append(exc)
            raise

    del first, second
    try:
        register_io_source(source, schema=schema).sink_parquet(sink, compression="zstd", metadata=kv,
                                                               compression_level=ZSTD_LEVEL, maintain_order=True)
    except Exception:
        if failure:
            raise failure[0] from None
        raise
    return rows[0]


def commit_index(out_dir: Path, manifest: dict) -> None:
    """Write ``manifest`` beside the staged neighbours file and rename both into place (module
    docstring); the staging folder is removed whatever happens."""
    staging = staging_folder(out_dir)
    try:
        (staging / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
        if (out_dir / MANIFEST).exists() and (out_dir / NEIGHBOURS).exists():
            _keep_previous(out_dir, staging)
        os.replace(staging / NEIGHBOURS, out_dir / NEIGHBOURS)
        os.replace(staging / MANIFEST, out_dir / MANIFEST)
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def discard_staging(out_dir: Path) -> None:
    shutil.rmtree(staging_folder(out_dir), ignore_errors=True)


def _keep_previous(out_dir: Path, staging: Path) -> None:
    """Make ``previous/`` hard links to the index in place. Built whole in the staging folder,
    then two renames: the old ``previous/`` into the staging folder (removed with it), the new
    one into place (again if a folder came there in between). Between the renames there is no
    ``previous/``, while the index in place is still whole."""
    fresh = staging / PREVIOUS
    fresh.mkdir()
    for name in (NEIGHBOURS, MANIFEST):
        _link(out_dir / name, fresh / name)
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


def open_index(folder: str | Path) -> tuple[Manifest, Path]:
    """The manifest and the neighbours file of the index in ``folder``; one-line errors for a
    folder that is not an index."""
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: no such index folder")
    manifest = read_manifest(folder)
    path = folder / NEIGHBOURS
    if not path.is_file():
        raise InputError(f"{folder}: no {NEIGHBOURS}; is this an lshjob index folder?")
    return manifest, path


def read_manifest(out_dir: Path) -> Manifest:
    """The manifest of the index in ``out_dir`` (checked: :mod:`lshjob.contracts.manifest`)."""
    path = Path(out_dir) / MANIFEST
    if not path.is_file():
        raise InputError(f"{out_dir}: no {MANIFEST}; is this an lshjob index folder?")
    return read_manifest_file(path)


def _link(source: Path, target: Path) -> None:
    """Hard-link ``source`` to ``target``. A writer without the folder's lock may rename a new
    file over ``source`` while the link is made; Linux then fails the link with ENOENT (the
    inode looked up has just lost its last name) although ``source`` exists again: try anew."""
    for attempt in range(8):
        try:
            os.link(source, target)
            return
        except FileNotFoundError:
            if attempt == 7 or not source.exists():
                raise
