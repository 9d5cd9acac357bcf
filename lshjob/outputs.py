"""Output paths checked against the inputs before anything is read or written: an output that
is one of the inputs would replace them (``lshjob sign loans.parquet --out loans.parquet``
would leave signatures where the events were), and one that a later run would read as an input
(a file in an input folder, or matched by an input pattern) would mix outputs into inputs."""

from __future__ import annotations

import fnmatch
import glob
import os
from pathlib import Path

from .errors import ParameterError

PATTERN_CHARS = "*?["


def refuse_output_over_inputs(out: str | Path, sources: list[str | Path], folder: bool = False) -> None:
    """Raise :class:`ParameterError` when ``out`` is one of the files or folders ``sources``
    name (a file, a glob or a directory), or, for an output file (``folder`` False), when it
    lies in an input folder or matches an input pattern."""
    target = _absolute(out)
    for source in sources:
        text = str(source)
        if any(ch in text for ch in PATTERN_CHARS):
            inputs = [_absolute(p) for p in glob.glob(text)]
            if any(_same(target, p) for p in inputs):
                raise ParameterError(f"--out {out} is one of the inputs; choose another path")
            if not folder and fnmatch.fnmatchcase(str(target), str(_absolute(text))):
                raise ParameterError(f"--out {out} matches the input pattern {text}; choose another path")
            continue
        given = _absolute(text)
        if _same(target, given):
            raise ParameterError(f"--out {out} is one of the inputs; choose another path")
        if given.is_dir() and not folder and _same(target.parent, given):
            raise ParameterError(f"--out {out} is in the input folder {text}; choose another path")


def _absolute(path: str | Path) -> Path:
    """The path with '~', '..' and symbolic links resolved, whether or not it exists."""
    return Path(os.path.expanduser(str(path))).resolve()


def _same(a: Path, b: Path) -> bool:
    if a == b:
        return True
    try:
        return os.path.samefile(a, b)  # hard links too
    except OSError:  # one of them does not exist
        return False
