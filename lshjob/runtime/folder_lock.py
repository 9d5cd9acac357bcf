"""One writer per output folder: an OS lock on a file inside the folder, naming its holder.

::

    with output_lock(folder, wait=0, what="index") as lock:
        ...  # write into folder; lock.notes says whether a dead holder's lock was taken over

The authority is ``fcntl.flock`` on ``FOLDER/.lshjob.lock``. The kernel drops the lock when
its holder's process ends, however it ends (SIGKILL included), so a crashed run never blocks
the next one; on NFS, Linux clients (2.6.12 on) pass it to the server as a byte-range lock,
so runs on other hosts see it too. The file's contents, JSON with the holder's pid, host,
start time (UTC) and command, are facts for messages only: they are never trusted to decide
who holds the lock.

A holder that lets go removes the file while still holding the lock, then unlocks. A run
that was waiting on the removed file finds, once it has the lock, that the path no longer
leads to the file it locked, and starts over on the new one; so two runs can never hold
locks on two different files of one path. A file found at the path when the lock is taken
was therefore left by a holder that ended without letting go: the lock is taken over and
:attr:`OutputLock.notes` says whose it was.
"""

from __future__ import annotations

import fcntl
import json
import os
import shlex
import socket
import sys
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from lshjob.errors import Busy

LOCK_NAME = ".lshjob.lock"
POLL_SECONDS = 0.1
_COMMAND_CHARS = 160  # of the holder's command line, in messages


@dataclass(frozen=True)
class Holder:
    """What a lock file says about the run that took it."""

    pid: int
    host: str
    started: str  # UTC, ISO 8601 with Z
    command: str
    what: str

    @staticmethod
    def of_this_process(what: str) -> Holder:
        return Holder(pid=os.getpid(), host=socket.gethostname(),
                      started=datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
                      command=shlex.join(sys.argv), what=what)

    @staticmethod
    def parse(data: bytes) -> Holder | None:
        try:
            fields = json.loads(data)
            return Holder(pid=int(fields["pid"]), host=str(fields["host"]), started=str(fields["started"]),
                          command=str(fields.get("command", "")), what=str(fields.get("what", "")))
        except (ValueError, TypeError, KeyError):
            return None

    def describe(self) -> str:
        command = self.command if len(self.command) <= _COMMAND_CHARS else self.command[:_COMMAND_CHARS] + "..."
        return f"pid {self.pid} on host {self.host}, started {self.started}" + (
            f", command: {command}" if command else "")

    def gone(self) -> bool:
        """True when the holder ran on this host and its process no longer exists."""
        if self.host != socket.gethostname():
            return False
        try:
            os.kill(self.pid, 0)
        except ProcessLookupError:
            return True
        except PermissionError:  # alive, another user's
            return False
        return False


class OutputLock:
    """The lock on one output folder (module docstring). ``wait``: seconds to keep trying
    while another run holds it (0: give up at once); then :class:`~lshjob.errors.Busy`."""

    def __init__(self, folder: str | Path, wait: float = 0.0, what: str = "index") -> None:
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self.wait = float(wait)
        self.what = what
        self.notes: list[str] = []
        self.taken_over: Holder | None = None  # facts of a holder that ended without letting go
        self._fd: int | None = None
        self._made_folder = False

    def __enter__(self) -> OutputLock:
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()

    @property
    def held(self) -> bool:
        return self._fd is not None

    def acquire(self) -> OutputLock:
        if self._fd is not None:
            raise RuntimeError(f"{self.path}: already held by this lock")
        deadline = time.monotonic() + self.wait
        fd = None
        try:
            while True:
                if fd is None:
                    fd = self._open()
                    if fd is None:  # the folder went away as a holder let go: make it again
                        continue
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except BlockingIOError:
                    left = deadline - time.monotonic()
                    if left <= 0:
                        raise Busy(self._busy_message()) from None
                    time.sleep(min(POLL_SECONDS, left))
                    continue
                if self._still_at_path(fd):
                    break
                os.close(fd)  # locked a file its holder removed as it let go; lock the new one
                fd = None
            self._take(fd)
        except BaseException:
            if fd is not None:
                os.close(fd)
            raise
        self._fd = fd
        return self

    def release(self) -> None:
        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            try:
                os.unlink(self.path)  # while still locked: see the module docstring
            except FileNotFoundError:
                pass
        finally:
            os.close(fd)  # closing the last descriptor drops the lock
        if self._made_folder:
            try:
                self.folder.rmdir()  # a failed first run leaves no empty folder behind
            except OSError:
                pass

    def _open(self) -> int | None:
        if not self.folder.is_dir():
            self.folder.mkdir(parents=True, exist_ok=True)
            self._made_folder = True
        try:
            return os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        except FileNotFoundError:
            return None

    def _still_at_path(self, fd: int) -> bool:
        try:
            at_path = os.stat(self.path)
        except FileNotFoundError:
            return False
        mine = os.fstat(fd)
        return (at_path.st_dev, at_path.st_ino) == (mine.st_dev, mine.st_ino)

    def _take(self, fd: int) -> None:
        """Note whose lock this was if its holder did not let go, then write this run's facts."""
        left = os.pread(fd, 1 << 16, 0)
        if left:
            holder = Holder.parse(left)
            self.taken_over = holder
            if holder is None:
                self.notes.append(f"{self.folder}: took over a lock a run left without letting go "
                                  f"({self.path} did not name it)")
            else:
                state = "; that process no longer exists" if holder.gone() else ""
                self.notes.append(f"{self.folder}: took over the lock of a run that ended without letting go "
                                  f"({holder.describe()}{state})")
        facts = json.dumps(Holder.of_this_process(self.what).__dict__, sort_keys=True).encode() + b"\n"
        os.ftruncate(fd, 0)
        os.pwrite(fd, facts, 0)

    def _busy_message(self) -> str:
        try:
            holder = Holder.parse(self.path.read_bytes())
        except OSError:
            holder = None
        who = holder.describe() if holder is not None else "its details are not written yet"
        what = holder.what if holder is not None and holder.what else self.what
        if self.wait > 0:
            return (f"{self.folder}: another lshjob run holds the lock on this {what} ({who}); "
                    f"waited {self.wait:g} s; retry later or pass a longer --wait")
        return (f"{self.folder}: another lshjob run holds the lock on this {what} ({who}); "
                "retry later or pass --wait SECONDS")


def output_lock(folder: str | Path, wait: float = 0.0, what: str = "index") -> OutputLock:
    """The lock on ``folder``, taken by ``with`` (or :meth:`OutputLock.acquire`)."""
    return OutputLock(folder, wait=wait, what=what)
