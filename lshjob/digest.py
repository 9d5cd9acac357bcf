"""The digest of a run's input files: what the manifest records as ``inputs.sha256`` and what
``lshjob audit`` compares its events with.

sha256 over each file in turn: its name (UTF-8) and a zero byte, then its bytes.
"""

from __future__ import annotations

import hashlib
from concurrent.futures import Future, ThreadPoolExecutor


def input_digest(files: list[str], names: list[str] | None = None) -> tuple[int, str]:
    """(bytes, sha256) of ``files``; ``names`` (default: the files as given) are the names
    hashed, so files read under another path can be compared with a run's digest."""
    h = hashlib.sha256()
    sizes = 0
    for file, name in zip(files, names if names is not None else files):
        h.update(str(name).encode() + b"\0")
        with open(file, "rb") as fh:
            while block := fh.read(1 << 22):
                h.update(block)
                sizes += len(block)
    return sizes, h.hexdigest()


def digest_in_background(files: list[str], names: list[str] | None = None) -> Future:
    """:func:`input_digest`, computed in a thread while the caller works (hashlib releases the
    GIL on large blocks): 0.3 s of serial time at 1M entities otherwise."""
    pool = ThreadPoolExecutor(max_workers=1)
    future = pool.submit(input_digest, files, names)
    pool.shutdown(wait=False)
    return future
