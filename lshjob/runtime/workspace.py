"""A run's work folder, and removing what runs that died left behind.

A run works (sets of each part, bucket files, candidates, DuckDB's spill) in
``OUT/.work-PID``, or with ``--scratch DIR`` in ``DIR/lshjob-work-ID-PID``, where ID is the
first 16 hex digits of the SHA-256 of the output folder's absolute path (so two outputs
sharing one scratch disk never touch each other's folders). Publishing stages the index in
``OUT/.staging-PID``. A run removes both when it ends, but a run killed (SIGKILL, the
machine's out-of-memory killer, a power cut) leaves them, DuckDB's spill included.

:func:`remove_leftovers` runs while the output folder's lock is held
(:mod:`lshjob.runtime.folder_lock`): holding it proves that no other run writes to that output, so
every such folder there is a dead run's.
"""

from __future__ import annotations

import hashlib
import os
import shutil
from pathlib import Path

WORK_PREFIX = ".work-"
STAGING_PREFIX = ".staging-"
SCRATCH_PREFIX = "lshjob-work-"


def output_id(out: str | Path) -> str:
    """16 hex digits naming an output folder in a shared scratch folder (SHA-256 of its path)."""
    return hashlib.sha256(os.fsencode(os.path.realpath(out))).hexdigest()[:16]


def work_folder(out: str | Path, scratch: str | Path | None = None) -> Path:
    """Where this process works for output ``out`` (module docstring); not created here."""
    if scratch is None:
        return Path(out) / f"{WORK_PREFIX}{os.getpid()}"
    return Path(scratch) / f"{SCRATCH_PREFIX}{output_id(out)}-{os.getpid()}"


def leftovers(out: str | Path, scratch: str | Path | None = None) -> list[Path]:
    """Work and staging folders of runs into ``out``, in ``out`` and in ``scratch``."""
    found = []
    out = Path(out)
    if out.is_dir():
        found += [p for p in out.iterdir() if p.name.startswith((WORK_PREFIX, STAGING_PREFIX))]
    if scratch is not None and Path(scratch).is_dir():
        mine = f"{SCRATCH_PREFIX}{output_id(out)}-"
        found += [p for p in Path(scratch).iterdir() if p.name.startswith(mine)]
    return sorted(found)


def remove_leftovers(out: str | Path, scratch: str | Path | None = None) -> list[str]:
    """Remove the work and staging folders dead runs left (call only with the output's lock
    held); return a note naming them and the bytes reclaimed, or nothing if there were none."""
    found = leftovers(out, scratch)
    if not found:
        return []
    reclaimed = 0
    for path in found:
        reclaimed += disk_bytes(path)
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink(missing_ok=True)
    names = ", ".join(str(p) for p in found[:4]) + (f" and {len(found) - 4} more" if len(found) > 4 else "")
    return [f"removed {len(found)} folder(s) left by runs that ended without cleaning up ({names}): "
            f"{_size(reclaimed)} reclaimed"]


def disk_bytes(path: Path) -> int:
    """Disk space freed by removing ``path``: allocated blocks of files with no other link."""
    if not path.is_dir() or path.is_symlink():
        st = os.lstat(path)
        return st.st_blocks * 512 if st.st_nlink == 1 else 0
    total = 0
    for root, _dirs, files in os.walk(path):
        for name in files:
            try:
                st = os.lstat(os.path.join(root, name))
            except OSError:
                continue
            if st.st_nlink == 1:
                total += st.st_blocks * 512
    return total


def _size(n: int) -> str:
    for unit, scale in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= scale:
            return f"{n / scale:.1f} {unit}"
    return f"{n} bytes"
