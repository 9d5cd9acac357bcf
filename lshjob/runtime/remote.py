"""Folders named by URI (``hdfs://``, ``s3://`` or Spark's ``s3a://``, ``gs://``, ``file://``),
reached through Arrow's file systems (``pyarrow.fs``), and a writer's marker in them.

A :class:`Location` is one folder: its URI as given (the name Spark writes to, without a
query) and the Arrow file system and path that reach it from this process. Arrow takes its
settings from the usual places: the URI's query (``s3://bucket/index?region=eu-west-1``), the
environment (``AWS_ENDPOINT_URL``, ``AWS_ACCESS_KEY_ID``, ``HADOOP_HOME`` and ``CLASSPATH``
for HDFS), and the credential chains of each store.

Object stores have no rename and no lock: :class:`MarkerLock` is a marker object,
``.lshjob.lock``, holding the facts of the run that writes (as the folder lock's file does,
:mod:`lshjob.runtime.folder_lock`), written after checking that none is there and read back.
It keeps out a second run that starts while one writes; two runs that start within the same
moment on different hosts can both pass the check (no store offers an atomic create-if-absent
through Arrow). On the driver's host the exclusion is exact: the marker is taken under a lock
of this host's (:func:`lshjob.runtime.folder_lock.output_lock` on a folder named by the URI
in the temporary folder).
"""

from __future__ import annotations

import hashlib
import json
import secrets
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from lshjob.errors import Busy, InputError
from lshjob.runtime.folder_lock import POLL_SECONDS, Holder, output_lock

_ARROW_SCHEMES = {"s3a": "s3", "s3n": "s3"}  # Spark's names of the S3 file system, Arrow's
MARKER = ".lshjob.lock"


def is_uri(given) -> bool:
    """True for ``scheme://...``; a plain path is the driver's."""
    return "://" in str(given)


def arrow_uri(path: str) -> str:
    """``path`` as Arrow's file systems name it (``s3a://`` and ``s3n://`` are ``s3://``)."""
    scheme, sep, rest = path.partition("://")
    return f"{_ARROW_SCHEMES.get(scheme, scheme)}{sep}{rest}" if sep else path


@dataclass(frozen=True)
class Location:
    """A folder of a file system Arrow opens (module docstring)."""

    uri: str  # as given, without a query or a trailing slash
    fs: object  # pyarrow.fs.FileSystem
    root: str  # the folder's path in ``fs``

    @classmethod
    def open(cls, given: str, option: str = "--out") -> Location:
        """The folder ``given`` names; a one-line error when Arrow cannot reach it from here."""
        try:
            from pyarrow import fs
        except ImportError:
            raise InputError(f"{option} {given}: a URI needs pyarrow (pip install 'lshjob[spark]')") from None
        base = given.split("?", 1)[0].rstrip("/")
        try:
            filesystem, root = fs.FileSystem.from_uri(arrow_uri(given))
        except Exception as exc:  # noqa: BLE001 - Arrow raises several kinds, all mean "not reachable"
            reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InputError(f"{option} {base}: this file system cannot be opened from here ({reason})") from None
        return cls(base, filesystem, root.rstrip("/") or "/")

    @property
    def local(self) -> Path | None:
        """The folder as a path of this machine, for ``file://``; else None."""
        from pyarrow import fs

        return Path(self.root) if isinstance(self.fs, fs.LocalFileSystem) else None

    def path(self, *names: str) -> str:
        return "/".join([self.root.rstrip("/"), *names]) if names else self.root

    def uri_of(self, *names: str) -> str:
        return "/".join([self.uri, *names])

    def child(self, *names: str) -> Location:
        return Location(self.uri_of(*names), self.fs, self.path(*names))

    def kind(self, *names: str) -> str | None:
        """``file``, ``folder``, or None when nothing is there."""
        from pyarrow import fs

        info = self.fs.get_file_info(self.path(*names))
        return {fs.FileType.File: "file", fs.FileType.Directory: "folder"}.get(info.type)

    def names(self, *names: str) -> list[str]:
        """The names directly inside a folder (none when it does not exist), sorted."""
        from pyarrow import fs

        infos = self.fs.get_file_info(fs.FileSelector(self.path(*names), allow_not_found=True))
        return sorted(info.base_name for info in infos)

    def read(self, *names: str) -> bytes:
        with self.fs.open_input_stream(self.path(*names)) as stream:
            return stream.read()

    def write(self, data: bytes, *names: str) -> None:
        """The whole object at once (object stores show it only once complete)."""
        with self.fs.open_output_stream(self.path(*names)) as stream:
            stream.write(data)

    def remove(self, *names: str) -> None:
        """Remove a file or a folder and all it holds; nothing if nothing is there."""
        kind = self.kind(*names)
        if kind == "folder":
            self.fs.delete_dir(self.path(*names))
        elif kind == "file":
            self.fs.delete_file(self.path(*names))


class MarkerLock:
    """The writer's marker in a folder named by URI (module docstring), with the interface of
    :class:`lshjob.runtime.folder_lock.OutputLock` (``acquire``, ``release``, ``notes``)."""

    def __init__(self, folder: Location, wait: float = 0.0, what: str = "index") -> None:
        self.folder, self.wait, self.what = folder, float(wait), what
        self.notes: list[str] = []
        self.token = secrets.token_hex(8)
        key = hashlib.sha256(folder.uri.encode()).hexdigest()[:16]
        self.host_lock = output_lock(Path(tempfile.gettempdir()) / "lshjob-uri-locks" / key, wait=wait, what=what)
        self._held = False

    def acquire(self) -> MarkerLock:
        self.host_lock.acquire()
        try:
            deadline = time.monotonic() + self.wait
            while (holder := self._holder()) is not None:
                if holder is not False and holder.gone():  # this host's run that ended without letting go
                    self.notes.append(f"{self.folder.uri}: took over the marker of a run that ended without "
                                      f"letting go ({holder.describe()}; that process no longer exists)")
                    break
                if time.monotonic() >= deadline:
                    raise Busy(self._busy_message(holder))
                time.sleep(min(POLL_SECONDS * 10, max(deadline - time.monotonic(), 0.01)))
            facts = dict(Holder.of_this_process(self.what).__dict__, token=self.token)
            self.folder.write(json.dumps(facts, sort_keys=True).encode() + b"\n", MARKER)
            again = self._holder()
            if again is None or again is False or self._token() != self.token:
                raise Busy(f"{self.folder.uri}: another lshjob run wrote its marker at the same moment; "
                           "retry later or pass --wait SECONDS")
        except BaseException:
            self.host_lock.release()
            raise
        self._held = True
        return self

    def release(self) -> None:
        if not self._held:
            return
        self._held = False
        try:
            if self._token() == self.token:
                self.folder.remove(MARKER)
        finally:
            self.host_lock.release()

    def _raw(self) -> bytes | None:
        return self.folder.read(MARKER) if self.folder.kind(MARKER) == "file" else None

    def _holder(self):
        """None: no marker; False: one that names no run; else its :class:`Holder`."""
        raw = self._raw()
        if raw is None:
            return None
        return Holder.parse(raw) or False

    def _token(self) -> str | None:
        raw = self._raw()
        try:
            return json.loads(raw).get("token") if raw else None
        except ValueError:
            return None

    def _busy_message(self, holder) -> str:
        who = holder.describe() if holder else "it names no run"
        waited = f"waited {self.wait:g} s; " if self.wait > 0 else ""
        return (f"{self.folder.uri}: another lshjob run is writing this {self.what} ({who}); {waited}retry later, "
                f"pass --wait SECONDS, or remove {self.folder.uri_of(MARKER)} if no run writes there")


def refuse_uri(given, command: str) -> None:
    """One line for a command that reads an index folder of this machine only."""
    if is_uri(given) and not str(given).startswith("file://"):
        raise InputError(f"{given}: lshjob {command} reads an index folder of this machine; copy the folder "
                         "here first (lshjob audit reads an index from a URI)")


def local_or_none(given) -> Path | None:
    """A ``file://`` URI as the path it names (None for any other URI)."""
    text = str(given)
    return Path(text.removeprefix("file://")) if text.startswith("file://") else None


def fetch_index(given: str, into: Path, names: tuple[str, ...]) -> None:
    """Copy the files ``names`` of the index folder ``given`` (a URI) into ``into``, in that
    order (the manifest first: a folder being published has none, and is refused here)."""
    from pyarrow import fs

    folder = Location.open(given, option="index")
    if folder.kind() != "folder":
        raise InputError(f"{folder.uri}: no such index folder")
    for name in names:
        if folder.kind(name) != "file":
            raise InputError(f"{folder.uri}: no {name}; is this an lshjob index folder (or one being published)?")
        fs.copy_files(folder.path(name), str(into / name), source_filesystem=folder.fs,
                      destination_filesystem=fs.LocalFileSystem())
