"""Numba's compile cache: where it lives, a notice when kernels compile, and filling it ahead.

lshjob's kernels are compiled by numba for the machine they run on, the first time each is
called, and kept on disk (``cache=True``); later processes load them in a fraction of a
second. Where they are kept:

* ``LSHJOB_CACHE_DIR``, when set, becomes ``NUMBA_CACHE_DIR`` for the process (set by
  ``import lshjob``, before numba reads it; also when numba was imported first);
* else ``NUMBA_CACHE_DIR`` when set;
* else numba's own default: ``__pycache__`` beside the modules when that folder is
  writable, else a user folder (``~/.cache/numba`` on Linux).

Numba uses a folder only if it can write there, even to read a cache, so a cache filled in
an image build must stay writable by the user who runs the job.

:func:`install_notice` prints one line on stderr when the first kernel of a process is
about to compile (numba found no cached code for this machine and these types);
:func:`lshjob.jobs.workload.fill_cache` compiles every kernel the job uses by running each
command on a tiny generated data set.
"""

from __future__ import annotations

import os
import sys

ENV = "LSHJOB_CACHE_DIR"
# the notice's estimate, on 2 cores (bench/RESULTS.md, "Cold start", 2026-12-05): a cold
# `lshjob demo` 50-59 s, a cold long-tailed run of 1M entities about 110 s (24 s warm)
COLD_TIME = "about a minute for a small run, up to about 2 minutes for a large one"


def configure_cache_dir() -> str | None:
    """Point numba at ``LSHJOB_CACHE_DIR`` when it is set; return the folder numba is told
    to use (None: numba's default)."""
    path = os.environ.get(ENV)
    if path:
        path = os.path.abspath(os.path.expanduser(path))
        os.environ["NUMBA_CACHE_DIR"] = path
        config = sys.modules.get("numba.core.config")
        if config is not None:  # numba imported first: it has read its settings already
            config.CACHE_DIR = path
    return os.environ.get("NUMBA_CACHE_DIR") or None


def cache_folder(dispatcher=None) -> str:
    """The folder compiled kernels go to: the set one, else where numba's default put the
    kernel ``dispatcher`` (a compiled lshjob function)."""
    import numba

    if numba.config.CACHE_DIR:
        return str(numba.config.CACHE_DIR)
    if dispatcher is None:
        from lshjob.core import hashing

        dispatcher = hashing._xxh64_many
    try:
        return str(dispatcher._cache._cache_path)  # numba's locator: __pycache__ or the user folder
    except AttributeError:
        return "numba's default"


def readonly(array):
    """A read-only contiguous view of ``array`` (a copy only when it is not contiguous).
    Numba compiles a kernel once per argument type, and a read-only array is another type
    than a writable one: kernels given their inputs through this see one type whether the
    caller's array came from polars (read-only views) or numpy (writable)."""
    import numpy as np

    view = np.ascontiguousarray(array).view()
    view.flags.writeable = False
    return view


def _quiet_command() -> bool:
    return any(arg in ("--quiet", "-q") for arg in sys.argv[1:])


class _Notice:
    """A listener of numba's compile events: numba fires one only when it compiles, never
    when it loads a kernel from the cache."""

    def __init__(self) -> None:
        self.shown = False
        self.enabled = True

    def on_start(self, event) -> None:
        if self.shown or not self.enabled:
            return
        dispatcher = event.data.get("dispatcher")
        module = getattr(getattr(dispatcher, "py_func", None), "__module__", "") or ""
        if not module.startswith("lshjob.") or _quiet_command():
            return
        self.shown = True
        print(f"lshjob: compiling kernels for this machine (once: {COLD_TIME}; "
              f"kept in {cache_folder(dispatcher)})", file=sys.stderr, flush=True)

    def on_end(self, event) -> None:
        pass


NOTICE = _Notice()


_NOTICE_INSTALLED = []


def install_notice() -> None:
    """Print the notice (stderr, once a process, not under ``--quiet``) when a kernel is
    about to compile (registered once a process, by :mod:`lshjob.core._jit`)."""
    if _NOTICE_INSTALLED:
        return
    _NOTICE_INSTALLED.append(True)
    from numba.core import event

    class Listener(event.Listener):
        def on_start(self, ev):
            NOTICE.on_start(ev)

        def on_end(self, ev):
            NOTICE.on_end(ev)

    event.register("numba:compile", Listener())
