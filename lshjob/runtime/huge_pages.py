"""Transparent huge pages for the ``lshjob`` process's heap.

A run allocates and fills arrays of hundreds of megabytes stage after stage (numba's kernels
allocate theirs through glibc's ``malloc``, not numpy's allocator), and each is new memory
touched a 4 KiB page at a time: at 1M long-tailed entities about 1.8M page faults and 7-9 s of
system time. glibc's tunable ``glibc.malloc.hugetlb=1`` (glibc 2.35 and later) has ``malloc``
ask the kernel for transparent huge pages (2 MiB) where the system allows them on request
(``/sys/kernel/mm/transparent_hugepage/enabled`` set to ``madvise`` or ``always``): half the
page faults and 0.87 of the wall and CPU time of that run (docs/performance.md). The results do
not change: only where the memory comes from.

glibc reads its tunables when a process starts, so the console script starts itself again
with the tunable added to ``GLIBC_TUNABLES`` (:func:`restart_with_huge_pages`), before any
library is imported: the same process id, arguments and environment otherwise. The stop
signals are blocked across the start (a blocked signal stays pending through ``execve``) and
released once the new start has its handlers (:func:`release_held_signals`), so a SIGINT,
SIGTERM or SIGHUP that comes in between stops the run as cleanly as one that comes later. Nothing
happens when the tunable is set already (``GLIBC_TUNABLES=glibc.malloc.hugetlb=0`` keeps
glibc's default), off Linux or glibc, with a glibc older than 2.35, or when the system does
not give huge pages on request. Programs that import lshjob set the variable themselves.
"""

from __future__ import annotations

import os
import signal
import sys

from lshjob.runtime.stopping import SIGNALS

TUNABLE = "glibc.malloc.hugetlb"
MIN_GLIBC = (2, 35)  # the first glibc with the tunable
THP_ENABLED = "/sys/kernel/mm/transparent_hugepage/enabled"
HELD = "_LSHJOB_HELD_SIGNALS"  # the signals blocked for the start, for the new start to release


def tunables_to_start_with(environ: dict, libc: str | None, thp_setting: str | None) -> str | None:
    """The ``GLIBC_TUNABLES`` value to start again with, or None when there is nothing to gain:
    ``libc`` as ``os.confstr("CS_GNU_LIBC_VERSION")`` gives it ("glibc 2.36"), ``thp_setting``
    the text of :data:`THP_ENABLED` (the mode in brackets: "always [madvise] never")."""
    current = environ.get("GLIBC_TUNABLES", "")
    if any(item.split("=", 1)[0].strip() == TUNABLE for item in current.split(":")):
        return None  # set already, by the user or by this process's first start
    if not _glibc_at_least(libc, MIN_GLIBC) or _thp_mode(thp_setting) not in ("always", "madvise"):
        return None
    return f"{current}:{TUNABLE}=1" if current else f"{TUNABLE}=1"


def restart_with_huge_pages() -> None:
    """Start this process again (``os.execve``: same id and arguments) with glibc's huge-page
    tunable, when :func:`tunables_to_start_with` says so; return when it does not, or when the
    start fails (the run goes on as it is)."""
    if not sys.platform.startswith("linux") or not sys.executable or not getattr(sys, "orig_argv", None):
        return
    try:
        libc = os.confstr("CS_GNU_LIBC_VERSION")
    except (ValueError, OSError):
        return
    try:
        with open(THP_ENABLED, encoding="ascii") as handle:
            setting = handle.read()
    except OSError:
        return
    value = tunables_to_start_with(os.environ, libc, setting)
    if value is None:
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, SIGNALS)
    held = ",".join(str(int(signum)) for signum in SIGNALS if signum not in previous)
    environ = dict(os.environ, GLIBC_TUNABLES=value, **{HELD: held})
    try:
        sys.stdout.flush()
        sys.stderr.flush()
        os.execve(sys.executable, sys.orig_argv, environ)
    except OSError:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


def release_held_signals() -> None:
    """Unblock the stop signals the first start blocked (:func:`restart_with_huge_pages`); one
    that came meanwhile is delivered now, to the handlers installed by then. Signals the
    process was started with blocked stay blocked."""
    held = os.environ.pop(HELD, None)
    if held:
        signal.pthread_sigmask(signal.SIG_UNBLOCK, [int(signum) for signum in held.split(",")])


def _glibc_at_least(libc: str | None, version: tuple[int, int]) -> bool:
    if not libc or not libc.startswith("glibc "):
        return False
    try:
        found = tuple(int(part) for part in libc.split()[1].split(".")[:2])
    except (IndexError, ValueError):
        return False
    return found >= version


def _thp_mode(setting: str | None) -> str | None:
    if not setting or "[" not in setting or "]" not in setting:
        return None
    return setting[setting.index("[") + 1:setting.index("]")]
