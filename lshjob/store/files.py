"""The store's files: per period a Parquet file of each entity's elements and one of their
signatures, and the published indexes kept.

Layout of a store folder::

    STORE/catalog.duckdb                           the catalog (lshjob.store.catalog)
    STORE/periods/2026-03-01.RUN.sets.parquet      entity, element: one row per distinct pair
    STORE/periods/2026-03-01.RUN.signatures.parquet entity, signature, set_size
    STORE/versions/RUN/                            a published index (neighbours.parquet, manifest.json)
    STORE/state/RUN.members.parquet (and sets, pairs, buckets) the state of the last index
                                                   (lshjob.jobs.refresh_index)
    STORE/work/                                    a refresh's scratch, removed at its end

A file is never changed once written: a period that gains events gets new files named with
the refresh's run id. Each file is written under a temporary name and renamed; only the
catalog says which files are the store's. What a killed refresh left (files no catalog row
names, its work folder) is removed by :func:`remove_strays` under the store's lock.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from datetime import date
from pathlib import Path

import polars as pl

from lshjob.store.catalog import CATALOG, State, StoredFile

PERIODS = "periods"
VERSIONS = "versions"
STATE = "state"
WORK = "work"
# Files checked by SHA-256 at each refresh: those under this size (the catalog's, the state's
# tables, delta files); larger ones by their size. Files are written under a temporary name and
# renamed, so a file the catalog names was whole when written: the hash finds later damage, at a
# cost that grows with the store, not the batch (at 1M patrons a period's sets file is 78 MB and
# hashing the three took 0.3 s, a tenth of a refresh of 1% of them).
HASH_BELOW = 32 * 2**20


def sha256_of(path: Path) -> str:
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def period_file(period: date, run_id: str, kind: str) -> str:
    """Path, relative to the store, of a period's ``kind`` (sets, signatures) file written by ``run_id``."""
    return f"{PERIODS}/{period.isoformat()}.{run_id}.{kind}.parquet"


def write_table(store: Path, relative: str, table: pl.DataFrame, kind: str, run_id: str,
                compression: str = "zstd") -> StoredFile:
    """Write ``table`` to ``store/relative`` (temporary name, fsync, rename) and return its catalog row
    (``compression`` lz4 for tables of hashes, which zstd does not shrink)."""
    path = Path(store) / relative
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    table.write_parquet(temporary, compression=compression, statistics=True)
    with open(temporary, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(temporary, path)
    return StoredFile(relative, kind, sha256_of(path), path.stat().st_size, run_id)


def read_table(store: Path, entry: StoredFile | str) -> pl.DataFrame:
    return pl.read_parquet(Path(store) / (entry.path if isinstance(entry, StoredFile) else entry))


def scan_tables(store: Path, relatives: list[str]) -> pl.LazyFrame:
    return pl.scan_parquet([Path(store) / r for r in relatives])


def check_files(store: Path, state: State, size_only: tuple[str, ...] = (), hash_below: int | None = None) -> list[str]:
    """Files of the catalog missing or not of their recorded size and SHA-256 (one line each);
    of the kinds ``size_only``, and of files of ``hash_below`` bytes or more, the size alone."""
    wrong = []
    for f in state.files:
        path = Path(store) / f.path
        hashed = f.kind not in size_only and (hash_below is None or f.bytes < hash_below)
        if not path.is_file():
            wrong.append(f"{path}: missing")
        elif path.stat().st_size != f.bytes or (hashed and sha256_of(path) != f.sha256):
            wrong.append(f"{path}: not the file the catalog recorded (size or SHA-256 differ)")
    return wrong


def remove_strays(store: Path, state: State) -> list[str]:
    """Remove what the catalog does not name (files of killed refreshes, work folders) and
    return what was removed. Call only while holding the store's lock."""
    store = Path(store)
    kept = {f.path for f in state.files} | {f"{VERSIONS}/{v.folder}" for v in state.versions}
    removed = []
    shutil.rmtree(store / WORK, ignore_errors=True)
    for folder in (PERIODS, VERSIONS, STATE):
        if not (store / folder).is_dir():
            continue
        for entry in sorted((store / folder).iterdir()):
            relative = f"{folder}/{entry.name}"
            if relative in kept:
                continue
            if entry.is_dir():
                shutil.rmtree(entry, ignore_errors=True)
            else:
                entry.unlink(missing_ok=True)
            removed.append(relative)
    return removed


def remove_paths(store: Path, relatives: list[str]) -> None:
    """Remove files or folders the catalog no longer names (after its transaction)."""
    for relative in relatives:
        path = Path(store) / relative
        if path.is_dir():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink(missing_ok=True)


def is_store(folder: Path) -> bool:
    """Whether ``folder`` is missing, empty (but for a lock file) or holds a catalog."""
    folder = Path(folder)
    if not folder.exists():
        return True
    if not folder.is_dir():
        return False
    names = {p.name for p in folder.iterdir()}
    return CATALOG in names or names <= {".lshjob.lock"}
