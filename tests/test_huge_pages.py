"""The console script's restart with glibc's huge-page tunable (lshjob/runtime/huge_pages.py).

What is checked: the decision from the environment, the glibc version string (the form
``os.confstr("CS_GNU_LIBC_VERSION")`` returns, glibc manual, "Configuration strings") and the
kernel's THP setting (its mode in brackets, Linux admin guide "Transparent Hugepage Support");
and, where this machine qualifies, that the restarted process keeps its id and arguments."""

from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

from lshjob.runtime.huge_pages import THP_ENABLED, TUNABLE, tunables_to_start_with

MADVISE = "always [madvise] never\n"


@pytest.mark.parametrize(("environ", "expected"), [
    ({}, "glibc.malloc.hugetlb=1"),
    ({"GLIBC_TUNABLES": "glibc.malloc.arena_max=2"}, "glibc.malloc.arena_max=2:glibc.malloc.hugetlb=1"),
    ({"GLIBC_TUNABLES": "glibc.malloc.hugetlb=0"}, None),  # the user's choice stays
    ({"GLIBC_TUNABLES": "glibc.malloc.arena_max=2:glibc.malloc.hugetlb=1"}, None),  # started again already
])
def test_the_tunable_is_added_once_and_a_value_given_is_kept(environ, expected):
    assert tunables_to_start_with(environ, "glibc 2.36", MADVISE) == expected


@pytest.mark.parametrize(("libc", "setting", "expected"), [
    ("glibc 2.35", MADVISE, True),
    ("glibc 2.40", "[always] madvise never", True),
    ("glibc 2.34", MADVISE, False),  # no such tunable before 2.35
    ("glibc 3.0", MADVISE, True),
    (None, MADVISE, False),  # not glibc (musl, macOS)
    ("", MADVISE, False),
    ("glibc x.y", MADVISE, False),
    ("glibc 2.36", "always madvise [never]", False),  # the system gives none
    ("glibc 2.36", None, False),  # no THP on this kernel
])
def test_the_restart_needs_glibc_2_35_and_huge_pages_on_request(libc, setting, expected):
    assert (tunables_to_start_with({}, libc, setting) is not None) is expected


def _qualifies() -> bool:
    try:
        libc = os.confstr("CS_GNU_LIBC_VERSION")
        with open(THP_ENABLED, encoding="ascii") as handle:
            setting = handle.read()
    except (ValueError, OSError):
        return False
    return sys.platform.startswith("linux") and tunables_to_start_with({}, libc, setting) is not None


SCRIPT = """
import os, signal, sys
print("start", os.getpid(), os.environ.get("GLIBC_TUNABLES"), flush=True)
from lshjob.runtime.huge_pages import release_held_signals, restart_with_huge_pages
restart_with_huge_pages()
print("after", os.getpid(), os.environ.get("GLIBC_TUNABLES"), sys.argv[1:], flush=True)
print("blocked", sorted(int(s) for s in signal.pthread_sigmask(signal.SIG_BLOCK, [])), flush=True)
release_held_signals()
print("released", sorted(int(s) for s in signal.pthread_sigmask(signal.SIG_BLOCK, [])),
      "_LSHJOB_HELD_SIGNALS" in os.environ, flush=True)
"""


@pytest.mark.skipif(not _qualifies(), reason="this machine's glibc or kernel gives no huge pages on request")
def test_the_process_starts_again_once_with_the_same_id_and_arguments():
    env = {k: v for k, v in os.environ.items() if k != "GLIBC_TUNABLES"}
    done = subprocess.run([sys.executable, "-c", SCRIPT, "one", "two"], capture_output=True, text=True, env=env,
                          check=True)
    lines = [line.split(" ", 2) for line in done.stdout.splitlines()]
    assert [line[0] for line in lines] == ["start", "start", "after", "blocked", "released"]
    # the stop signals are held through the start (pending ones stay so, signal(7)) and then let go
    stop = sorted(int(s) for s in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP))
    assert done.stdout.splitlines()[3:] == [f"blocked {stop}", "released [] False"]
    assert lines[0][1] == lines[1][1] == lines[2][1]  # execve keeps the process id
    assert lines[0][2] == "None" and lines[1][2] == f"{TUNABLE}=1"
    assert lines[2][2] == f"{TUNABLE}=1 ['one', 'two']"
    env["GLIBC_TUNABLES"] = f"{TUNABLE}=0"
    done = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, env=env, check=True)
    assert [line.split(" ")[0] for line in done.stdout.splitlines()] == ["start", "after", "blocked", "released"]
    assert done.stdout.splitlines()[2] == "blocked []"  # nothing held when there is no new start
