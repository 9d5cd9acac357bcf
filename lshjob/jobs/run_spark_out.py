"""Where a run on Spark publishes: a folder of the driver (a path), or a folder named by a URI
(``file://``, ``hdfs://``, ``s3a://``/``s3://``, ``gs://``: any file system Arrow opens).

Both give Spark a work folder that the driver and every executor reach, read back the sorted
parts Spark wrote there, stream them into ``neighbours.parquet`` and publish it with the
manifest, the manifest last; the run calls the same methods on either (:mod:`lshjob.jobs.run_spark`).

* :class:`DriverFolder`: a path of the driver, as a local run publishes (the folder's lock,
  a staging folder inside it, two renames: :mod:`lshjob.index.publish`).
* :class:`UriFolder`: through Arrow's file systems (:mod:`lshjob.runtime.remote`). Spark works
  in ``OUT/.work-PID`` beside the index (or in ``--scratch``). On a file system with renames
  (``file://``, ``hdfs://``) the file is streamed into ``OUT/.staging-PID/`` and then put in
  place by renames, each folder's manifest moved away first and put back last: the folder
  shows the old index, no index (a few renames long), then the new one. Object stores have no
  rename (a move copies, and one copy is at most 5 GB on S3), but an object appears only once
  its upload is complete: the old manifest is removed, the file streamed to its own name, and
  the manifest written last; until then the folder holds no manifest, so a reader that opens
  the manifest first sees no index rather than a mix, and one that read the old manifest
  before finds a file whose sha256 differs from it (``lshjob audit`` checks). ``previous/`` is
  kept by renames, or on object stores by server-side copies (a copy that fails is a warning).
  The lock: the folder lock on ``file://`` paths, a marker object elsewhere
  (:class:`lshjob.runtime.remote.MarkerLock`).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

import polars as pl

from lshjob.contracts.tables import NEIGHBOURS as NEIGHBOUR_ROWS
from lshjob.errors import ParameterError
from lshjob.index import publish
from lshjob.index.publish import MANIFEST, METADATA_KEY, NEIGHBOURS, PREVIOUS, stream_parquet
from lshjob.runtime.folder_lock import output_lock
from lshjob.runtime.outputs import output_folder
from lshjob.runtime.remote import Location, MarkerLock, is_uri
from lshjob.runtime.workspace import SCRATCH_PREFIX, STAGING_PREFIX, WORK_PREFIX, remove_leftovers, work_folder


def index_folder(out: str | Path, source: str, scratch: str | None, wait: float):
    """The folder ``out`` names, checked before anything is read or made (one-line errors)."""
    if is_uri(out):  # every URI through Arrow's file systems, file:// included
        return UriFolder(str(out), source, scratch, wait)
    return DriverFolder(out, source, scratch, wait)


class DriverFolder:
    """An index folder of the driver's file system (module docstring)."""

    def __init__(self, out: str | Path, source: str, scratch: str | None, wait: float) -> None:
        self.out = output_folder(out, _inputs(source), "run")
        self.scratch, self.wait = scratch, wait
        self.work = work_folder(self.out, scratch)
        self.name = str(self.out.absolute())

    def acquire(self) -> list[str]:
        self.lock = output_lock(self.out, wait=self.wait, what="index").acquire()
        return self.lock.notes + remove_leftovers(self.out, self.scratch)

    def work_uri(self, name: str) -> str:
        return (self.work / name).absolute().as_uri()

    def make_work(self) -> None:
        self.work.mkdir(parents=True)

    def stage(self, key: pl.DataType, metadata: dict, warnings: list[str]) -> dict:
        return publish.stage_neighbours(self.out, _parts(Location.open(self.work.absolute().as_uri()),
                                                         "neighbours", key), metadata)

    def commit(self, manifest: dict) -> None:
        publish.commit_index(self.out, manifest)

    def close(self) -> None:
        if getattr(self, "lock", None) is None:  # not ours to clean: the lock was not taken
            return
        shutil.rmtree(self.work, ignore_errors=True)
        publish.discard_staging(self.out)
        self.lock.release()


class UriFolder:
    """An index folder named by a URI (module docstring)."""

    def __init__(self, out: str, source: str, scratch: str | None, wait: float) -> None:
        self.loc = Location.open(out)
        self.name = self.loc.uri
        local = self.loc.local
        if local is not None:
            output_folder(local, _inputs(source), "run")
        else:
            _refuse_over_input(self.loc, source)
            if self.loc.kind() == "file":
                raise ParameterError(f"--out {self.loc.uri} is a file; run writes an index folder")
        self.scratch, self.wait = scratch, wait
        self.renames = _renames(self.loc.fs)
        pid = os.getpid()
        if scratch is not None:
            key = hashlib.sha256(self.loc.uri.encode()).hexdigest()[:16]
            self.work = Location.open(
                (Path(scratch) / f"{SCRATCH_PREFIX}{key}-{pid}").absolute().as_uri())
        else:
            self.work = self.loc.child(f"{WORK_PREFIX}{pid}")
        self.staging = f"{STAGING_PREFIX}{pid}"
        self.lock = None

    def acquire(self) -> list[str]:
        local = self.loc.local
        self.lock = (output_lock(local, wait=self.wait, what="index") if local is not None
                     else MarkerLock(self.loc, wait=self.wait, what="index")).acquire()
        notes = list(self.lock.notes)
        left = [n for n in self.loc.names() if n.startswith((WORK_PREFIX, STAGING_PREFIX))]
        if self.scratch is not None and Path(self.scratch).is_dir():
            mine = self.work.local.name.rsplit("-", 1)[0] + "-"
            left += [str(p) for p in Path(self.scratch).iterdir() if p.name.startswith(mine)]
        for name in left:
            if name.startswith("/"):
                shutil.rmtree(name, ignore_errors=True)
            else:
                self.loc.remove(name)
        if left:
            notes.append(f"removed {len(left)} folder(s) left by runs that ended without cleaning up "
                         f"({', '.join(left[:4])})")
        return notes

    def work_uri(self, name: str) -> str:
        return self.work.uri_of(name)

    def make_work(self) -> None:
        self.work.fs.create_dir(self.work.path(), recursive=True)

    def stage(self, key: pl.DataType, metadata: dict, warnings: list[str]) -> dict:
        """Stream Spark's parts into the neighbours file: in the staging folder when the file
        system renames, else (object stores) at its own name once the old manifest is gone."""
        if self.renames:
            self.loc.fs.create_dir(self.loc.path(self.staging), recursive=True)
            target = self.loc.path(self.staging, NEIGHBOURS)
        else:
            self._keep_previous_by_copies(warnings)
            self.loc.remove(MANIFEST)  # from here to the manifest's writing, no index is shown
            target = self.loc.path(NEIGHBOURS)
        kv = {METADATA_KEY: json.dumps(metadata, sort_keys=True)}
        with self.loc.fs.open_output_stream(target) as stream:
            sink = _Hashing(stream)
            rows = _stream(_parts(self.work, "neighbours", key), sink, kv)
        return {"neighbours": NEIGHBOURS, "rows": rows, "sha256": sink.sha.hexdigest(), "bytes": sink.bytes}

    def commit(self, manifest: dict) -> None:
        text = (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode()
        if not self.renames:
            self.loc.write(text, MANIFEST)
            return
        fs, path = self.loc.fs, self.loc.path
        self.loc.write(text, self.staging, MANIFEST)
        if self.loc.kind(MANIFEST) == "file" and self.loc.kind(NEIGHBOURS) == "file":
            self.loc.remove(PREVIOUS)
            fs.create_dir(path(PREVIOUS), recursive=True)
            fs.move(path(MANIFEST), path(self.staging, "previous-" + MANIFEST))  # the index disappears
            fs.move(path(NEIGHBOURS), path(PREVIOUS, NEIGHBOURS))
            fs.move(path(self.staging, "previous-" + MANIFEST), path(PREVIOUS, MANIFEST))
        else:
            self.loc.remove(MANIFEST)
        fs.move(path(self.staging, NEIGHBOURS), path(NEIGHBOURS))
        fs.move(path(self.staging, MANIFEST), path(MANIFEST))  # the index appears

    def close(self) -> None:
        if self.lock is None:  # not ours to clean: the lock was not taken
            return
        try:
            for folder in (self.work, self.loc.child(self.staging)):
                try:
                    folder.remove()
                except OSError:
                    pass
        finally:
            if self.lock is not None:
                self.lock.release()

    def _keep_previous_by_copies(self, warnings: list[str]) -> None:
        if not (self.loc.kind(MANIFEST) == "file" and self.loc.kind(NEIGHBOURS) == "file"):
            return
        fs, path = self.loc.fs, self.loc.path
        try:
            self.loc.remove(PREVIOUS, MANIFEST)  # the copy is not an index until its manifest is there
            fs.copy_file(path(NEIGHBOURS), path(PREVIOUS, NEIGHBOURS))
            fs.copy_file(path(MANIFEST), path(PREVIOUS, MANIFEST))
        except OSError as exc:
            self.loc.remove(PREVIOUS)
            warnings.append(f"{self.loc.uri_of(PREVIOUS)}: the index in place was not kept there ({exc})")


class _Hashing:
    """A writable that hashes and counts what passes to the stream under it."""

    def __init__(self, stream) -> None:
        self.stream, self.sha, self.bytes = stream, hashlib.sha256(), 0

    def write(self, data) -> int:
        self.sha.update(data)
        self.bytes += len(data)
        self.stream.write(data)
        return len(data)

    def flush(self) -> None:
        pass


def _stream(tables, sink, kv: dict) -> int:
    """Write ``tables`` (an iterator of NEIGHBOURS tables, in order) into ``sink`` as one
    Parquet file, a table at a time; the rows written."""
    pending = iter(tables)
    first = next(pending)
    second = next(pending, None)
    return stream_parquet(first, first.clear() if second is None else second, pending, sink, kv)


def _parts(work: Location, name: str, key: pl.DataType):
    """The rows Spark wrote into ``work/name``, part after part (their names are in partition
    order, the order of the sort), as NEIGHBOURS tables; one empty table when none holds a row."""
    import pyarrow.parquet as pq

    wrote = False
    for part in work.names(name):
        if part.startswith("part-") and part.endswith(".parquet"):
            table = pl.from_arrow(pq.read_table(work.path(name, part), filesystem=work.fs))
            if table.height:
                wrote = True
                yield NEIGHBOUR_ROWS.conform(table)
    if not wrote:
        yield NEIGHBOUR_ROWS.empty(key=key)


def _renames(filesystem) -> bool:
    """True for file systems whose moves are renames (the local one and HDFS)."""
    from pyarrow import fs

    return isinstance(filesystem, (fs.LocalFileSystem, fs.HadoopFileSystem))


def _inputs(source: str) -> list[str]:
    """The input as a path of the driver, for the checks of an output against it; none for
    inputs elsewhere."""
    if source.startswith("file://"):
        return [source.removeprefix("file://")]
    return [] if is_uri(source) else [source]


def _refuse_over_input(loc: Location, source: str) -> None:
    src = source.split("?", 1)[0].rstrip("/")
    if src == loc.uri or src.startswith(loc.uri + "/") or loc.uri.startswith(src + "/"):
        raise ParameterError(f"--out {loc.uri} overlaps the input {source}; choose another folder")
