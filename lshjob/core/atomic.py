"""Files written whole or not at all, and the sha256 of a file.

:func:`atomic_file` yields a temporary name beside the target (same folder, so the same file
system and ``os.replace`` is a rename); the caller's writer fills it; on a clean exit the file
is flushed to disk (fsync) and renamed over the target, and the folder's entry flushed after
it. If the writer raises, the temporary file is removed and the target is untouched: a reader
sees the old file or the new one, never half of one. :func:`staged_folder` is the same for a
folder of files (a partitioned Parquet output).

The temporary name is hidden (leading dot, so folder readers skip it), names the target and
the process, and ends with the target's suffix (writers that pick their format by suffix,
such as matplotlib's ``savefig``, see the right one).
"""

from __future__ import annotations

import hashlib
import itertools
import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

_serial = itertools.count()


def temp_name(path: Path) -> Path:
    """The temporary name beside ``path`` (module docstring); unique in the process."""
    return path.with_name(f".{path.name}.tmp-{os.getpid()}-{next(_serial)}{path.suffix}")


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_folder(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # a folder that cannot be opened for reading: the rename itself still happened
        return
    try:
        os.fsync(fd)
    except OSError:  # some file systems refuse fsync on a folder
        pass
    finally:
        os.close(fd)


@contextmanager
def atomic_file(path: str | Path, *, fsync: bool = True) -> Iterator[Path]:
    """Yield a temporary path for the contents of ``path``; rename it into place on a clean exit,
    remove it on an error (module docstring). ``fsync=False`` skips the flush to disk, for
    scratch files a crashed run never reads again."""
    path = Path(path)
    tmp = temp_name(path)
    try:
        yield tmp
        if fsync:
            _fsync_file(tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    if fsync:
        _fsync_folder(path.parent)


@contextmanager
def staged_folder(path: str | Path, *, fsync: bool = True) -> Iterator[Path]:
    """Yield a new empty folder beside ``path``; on a clean exit rename it to ``path`` (which
    must not exist or be an empty folder), on an error remove it with what it holds."""
    path = Path(path)
    tmp = temp_name(path)
    tmp.mkdir()
    try:
        yield tmp
        if fsync:
            for file in tmp.rglob("*"):
                if file.is_file():
                    _fsync_file(file)
        os.replace(tmp, path)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    if fsync:
        _fsync_folder(path.parent)


def file_sha256(path: str | Path) -> str:
    """The sha256 of one file's bytes, hex (``hashlib.file_digest``, which reads in blocks and
    releases the GIL while it hashes)."""
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def write_table(table, path: str | Path) -> Path:
    """Write a polars table to ``path`` as Parquet, atomically (the folders above made)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_file(path) as tmp:
        table.write_parquet(tmp)
    return path
