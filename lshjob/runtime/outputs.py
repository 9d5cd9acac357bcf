"""Output paths checked before anything is read or written, by every command that writes
(``sign`` and ``merge`` write one file, ``run`` an index folder, ``demo`` a folder of data and
results), from the command line and the Python API alike. Each refusal is one line naming
the path and what it is.

* An empty path (an unset ``$OUT``) or one of whitespace only is refused: it would mean the
  current folder.
* An output that is one of the inputs would replace them (``lshjob sign loans.parquet --out
  loans.parquet`` would leave signatures where the events were); one that a later job would
  read as an input (in an input folder, or matched by an input pattern) would mix outputs
  into inputs. For an index folder the same goes for the files published in it.
* A file output must be a regular file or not exist: a folder, a named pipe (FIFO), a device
  or a socket is refused (renaming the finished file over it would replace it). A symbolic
  link is followed: the file it leads to is replaced (atomically, by a temporary file beside
  it), and the link is kept.
* A folder output must be a folder or not exist; a symbolic link to a folder is followed.
* Every existing folder above the output must be a folder (``--out afile/s.parquet``).
* A URI (``s3a://...``) is refused here: only a run on Spark writes to one
  (:mod:`lshjob.jobs.run_spark_out`).
* ``--scratch`` must be an existing folder: it is meant to be on a disk of its own, and a
  mistyped path made on the spot would put the spill on another disk unnoticed.
* ``demo`` writes only into a new or empty folder, or one an earlier demo wrote (it holds
  :data:`DEMO_MARKER`), so a user's own ``events.parquet`` is never replaced.
"""

from __future__ import annotations

import fnmatch
import glob
import os
import stat
from pathlib import Path

from lshjob.errors import ParameterError

PATTERN_CHARS = "*?["
DEMO_MARKER = ".lshjob-demo"
PUBLISHED = ("neighbours.parquet", "manifest.json")  # the files a run publishes in its folder


def output_file(out: str | Path, sources: list[str | Path], command: str, option: str = "--out") -> Path:
    """Check ``out`` as the one file ``command`` writes from ``sources``; return the path to
    write: ``out`` itself, or the file a symbolic link ``out`` leads to."""
    path = _given(out, option)
    refuse_output_over_inputs(path, sources, given=out, option=option)
    target = Path(os.path.realpath(path)) if path.is_symlink() else path
    kind = _kind(target)
    if kind == "a folder":
        raise ParameterError(f"{option} {out} is a folder; {command} writes one file")
    if kind not in (None, "a file"):
        raise ParameterError(f"{option} {out} is {kind}{_via(path, target)}; {command} writes a regular file")
    _check_folders_above(target, out, option)
    return target


def output_folder(out: str | Path, sources: list[str | Path], command: str, what: str = "an index folder",
                  option: str = "--out") -> Path:
    """Check ``out`` as the folder ``command`` writes from ``sources`` (a symbolic link to a
    folder is followed); return it as a path."""
    path = _given(out, option)
    refuse_output_over_inputs(path, sources, given=out, folder=True, option=option)
    if path.is_symlink() and not path.exists():
        raise ParameterError(f"{option} {out} is a symbolic link to {os.readlink(path)}, which does not exist; "
                             "make that folder or choose another path")
    kind = _kind(path)
    if kind not in (None, "a folder"):
        raise ParameterError(f"{option} {out} is {kind}; {command} writes {what}")
    _check_folders_above(path, out, option)
    return path


def scratch_folder(scratch: str | Path | None) -> None:
    """Refuse a ``--scratch`` that is not an existing folder (module docstring)."""
    if scratch is None:
        return
    path = _given(scratch, "--scratch")
    kind = _kind(path)
    if kind is None:
        raise ParameterError(f"--scratch {scratch} does not exist; make the folder first")
    if kind != "a folder":
        raise ParameterError(f"--scratch {scratch} is not a folder (it is {kind})")


def demo_folder(out: str | Path) -> Path:
    """Check the folder ``lshjob demo`` writes: new, empty, or an earlier demo's."""
    path = output_folder(out, [], "demo", "a folder")
    if path.is_dir() and not (path / DEMO_MARKER).is_file() and any(path.iterdir()):
        raise ParameterError(f"--out {out} is a folder with other files in it (not an earlier demo's); demo "
                             "writes only into a new or empty folder or an earlier demo's; choose another folder")
    return path


def refuse_output_over_inputs(out: str | Path, sources: list[str | Path], folder: bool = False,
                              given: str | Path | None = None, option: str = "--out") -> None:
    """Raise :class:`ParameterError` when ``out`` is one of the files or folders ``sources``
    name (a file, a glob or a directory), or when it (for an output folder, a file published
    in it) lies in an input folder or matches an input pattern. ``given``: the path as the
    user gave it, for messages."""
    shown = out if given is None else given
    target = _absolute(out)
    written = [target] + ([target / name for name in PUBLISHED] if folder else [])
    for source in sources:
        text = str(source)
        if any(ch in text for ch in PATTERN_CHARS):
            inputs = [_absolute(p) for p in glob.glob(text)]
            if any(_same(target, p) for p in inputs):
                raise ParameterError(f"{option} {shown} is one of the inputs; choose another path")
            pattern = str(_absolute(text))
            if fnmatch.fnmatchcase(str(target), pattern):
                raise ParameterError(f"{option} {shown} matches the input pattern {text}; choose another path")
            for w in written[1:]:
                if fnmatch.fnmatchcase(str(w), pattern):
                    raise ParameterError(f"{option} {shown} would publish {w.name}, which the input pattern {text} "
                                         "matches; choose another path")
            continue
        absolute = _absolute(text)
        if _same(target, absolute):
            raise ParameterError(f"{option} {shown} is one of the inputs; choose another path")
        if absolute.is_dir() and any(_same(w.parent, absolute) for w in written):
            where = "is in" if _same(target.parent, absolute) else "would publish into"
            raise ParameterError(f"{option} {shown} {where} the input folder {text}; choose another path")


def _given(out: str | Path, option: str) -> Path:
    """``out`` as a path; an empty one (``Path('')`` is the current folder) refused."""
    text = os.fspath(out)
    if text == "":
        raise ParameterError(f"{option} is empty; give a path (an unset variable in the command line?)")
    if not text.strip():
        raise ParameterError(f"{option} {text!r} is only whitespace; give a path")
    if "://" in text:  # Path() would make "s3a:/bucket/..." here; only a run on Spark writes to a URI
        raise ParameterError(f"{option} {text}: a URI; this writes to a path of this machine (a run with "
                             "--engine spark writes an index to a URI)")
    return Path(os.path.expanduser(text))


def _kind(path: Path) -> str | None:
    """What is at ``path`` (links followed), in words; None when nothing is."""
    try:
        mode = os.stat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):  # a file above it is reported by the caller
        return None
    except OSError as exc:  # a loop of links, no permission to look
        raise ParameterError(f"{path}: {exc.strerror}") from None
    for test, words in ((stat.S_ISREG, "a file"), (stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a named pipe (FIFO)"),
                        (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
                        (stat.S_ISSOCK, "a socket")):
        if test(mode):
            return words
    return "not a regular file"


def _via(path: Path, target: Path) -> str:
    return f" (through the link to {target})" if target != path else ""


def _check_folders_above(path: Path, out: str | Path, option: str) -> None:
    """Every existing path above ``path`` must be a folder (it is made when missing)."""
    for above in path.parents:
        kind = _kind(above)
        if kind is None:
            continue
        if kind != "a folder":
            raise ParameterError(f"{option} {out}: {above} is {kind}, not a folder")
        return


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
