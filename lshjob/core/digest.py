"""The digest of a run's input files: what the manifest records under ``inputs`` and what
``lshjob audit`` compares its events with.

Each file: its absolute path, size, modification time (UTC ISO 8601) and sha256
(:func:`lshjob.core.atomic.file_sha256`, i.e. ``hashlib.file_digest``). All together
(``inputs.sha256``): the sha256 of the files' sha256 digests (hex, one a line, in the order
the files are read), so the digest depends on the files' bytes and order only, not on the
path they were read by. ``hashlib.file_digest`` alone cannot give it: it hashes one file
object to its end, while this digest chains several files in order (a digest of the files'
digests, so each file's own sha256, recorded beside it in the manifest, is computed once
and a folder read in several files needs no concatenation of them).
"""

from __future__ import annotations

import hashlib
from concurrent.futures import Future, ThreadPoolExecutor
from datetime import UTC, datetime
from pathlib import Path

from lshjob.core.atomic import file_sha256


def iso(moment: datetime) -> str:
    """UTC ISO 8601 with a ``Z``, to the microsecond."""
    return moment.astimezone(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def file_record(name: str | Path) -> dict:
    path = Path(name)
    stat = path.stat()
    sha = file_sha256(path)
    return {"path": str(path.absolute()), "bytes": stat.st_size,
            "mtime": iso(datetime.fromtimestamp(stat.st_mtime, UTC)), "sha256": sha}


def overall(records: list[dict]) -> tuple[int, str]:
    """(bytes, sha256) of all the files (module docstring)."""
    text = "".join(r["sha256"] + "\n" for r in records)
    return sum(r["bytes"] for r in records), hashlib.sha256(text.encode()).hexdigest()


def input_digest(files: list[str | Path]) -> tuple[tuple[int, str], list[dict]]:
    """((bytes, sha256) of all, one record a file) of ``files``."""
    records = [file_record(f) for f in files]
    return overall(records), records


def digest_in_background(files: list[str | Path]) -> Future:
    """:func:`input_digest`, computed in a thread while the caller works (hashlib releases the
    GIL on large blocks): 0.3 s of serial time at 1M entities otherwise."""
    pool = ThreadPoolExecutor(max_workers=1)
    future = pool.submit(input_digest, list(files))
    pool.shutdown(wait=False)
    return future
