"""The digest of the files a run on Spark read, computed on the executors.

Each file's sha256 is taken where the file is: an executor opens it through Arrow's file
systems (``pyarrow.fs.FileSystem.from_uri``: local and ``file://`` paths, ``hdfs://``,
``s3://`` and Spark's ``s3a://`` spelling of it, ``gs://``) and hashes it in 1 MiB blocks, so
the bytes never pass through the driver, which receives one record a file. The records and
their overall digest are those of :mod:`lshjob.core.digest` (the files in name order, as the
local engine reads a folder), so ``lshjob audit`` compares the events with a Spark run's input
as with a local run's. A file system Arrow cannot open gives no digest, and the reason.
"""

from __future__ import annotations

import hashlib

from lshjob.core.digest import iso, overall
from lshjob.runtime.remote import arrow_uri

BLOCK = 1 << 20


def file_record(path: str) -> dict:
    """The record of one file (:func:`lshjob.core.digest.file_record`'s keys), read where this runs."""
    from pyarrow import fs

    filesystem, inner = fs.FileSystem.from_uri(arrow_uri(path))
    info = filesystem.get_file_info(inner)
    sha = hashlib.sha256()
    with filesystem.open_input_stream(inner) as stream:
        while block := stream.read(BLOCK):
            sha.update(block)
    local = path.removeprefix("file://") if path.startswith("file:///") else path
    return {"path": local, "bytes": info.size, "mtime": iso(info.mtime) if info.mtime else None,
            "sha256": sha.hexdigest()}


def input_digest(spark, files: list[str]) -> tuple[tuple[int, str] | None, list[dict], str | None]:
    """((bytes, sha256) of all, the records in name order, None), or (None, [], why) when an
    executor could not read a file through Arrow."""
    ordered = sorted(files)
    if not ordered:
        return None, [], "no input file was listed"
    try:
        # one file a partition; collect keeps the partitions' order, the files' name order
        records = spark.sparkContext.parallelize(ordered, len(ordered)).map(file_record).collect()
    except Exception as exc:  # noqa: BLE001 - an executor's failure arrives as Py4J's error
        lines = [line for line in str(exc).splitlines() if "Error" in line] or [type(exc).__name__]
        return None, [], lines[-1].strip()[:200]
    return overall(records), records, None
