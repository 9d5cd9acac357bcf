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
:func:`fill_cache` compiles every kernel the job uses by running each command on a tiny
generated data set.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

ENV = "LSHJOB_CACHE_DIR"
COLD_SECONDS = 25  # the notice's estimate: a cold `lshjob demo` on 2 cores (bench/RESULTS.md)


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
        from . import grouping

        dispatcher = grouping.compact
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
        print(f"lshjob: compiling kernels for this machine (once, up to about {COLD_SECONDS} s; "
              f"kept in {cache_folder(dispatcher)})", file=sys.stderr, flush=True)

    def on_end(self, event) -> None:
        pass


NOTICE = _Notice()


_NOTICE_INSTALLED = []


def install_notice() -> None:
    """Print the notice (stderr, once a process, not under ``--quiet``) when a kernel is
    about to compile (registered once a process, by :mod:`lshjob._jit`)."""
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


class _Recorder:
    """Which lshjob kernels numba compiled, for which types, and how long each took
    (a kernel's time includes the helpers compiled within it)."""

    def __init__(self) -> None:
        self.started: dict[tuple, float] = {}
        self.compiled: list[dict] = []

    def listener(self):
        from numba.core import event

        recorder = self

        class Listener(event.Listener):
            def on_start(self, ev):
                recorder.started[_key(ev)] = time.perf_counter()

            def on_end(self, ev):
                name = _name(ev.data["dispatcher"])
                seconds = time.perf_counter() - recorder.started.pop(_key(ev), time.perf_counter())
                if name.startswith("lshjob."):
                    recorder.compiled.append({"kernel": name, "types": str(ev.data["args"]),
                                              "seconds": round(seconds, 3)})

        return Listener()


def _key(ev) -> tuple:
    return id(ev.data["dispatcher"]), str(ev.data["args"])


def _name(dispatcher) -> str:
    func = dispatcher.py_func
    return f"{func.__module__}.{func.__qualname__}"


def fill_cache(folder: str | Path | None = None) -> dict:
    """Compile every kernel the job uses, for the types it uses them with, by running each
    command (sign in both schemes, with weights, segments and periods, in parts; merge; plan;
    run on text, integer and sparse integer keys, weighted, in parts, at threshold 1; audit)
    on a tiny generated data set in a temporary folder (or ``folder``). Returns what was
    compiled, the seconds and the cache folder."""
    import numba
    from numba.core import event

    from .errors import ParameterError
    from .workload import exercise

    if numba.config.CACHE_DIR:  # numba would quietly compile into another folder instead
        try:
            os.makedirs(numba.config.CACHE_DIR, exist_ok=True)
            tempfile.TemporaryFile(dir=numba.config.CACHE_DIR).close()
        except OSError as exc:
            raise ParameterError(f"compile cache folder {numba.config.CACHE_DIR} (LSHJOB_CACHE_DIR or "
                                 f"NUMBA_CACHE_DIR): cannot write there: {exc.strerror or exc}") from None
    recorder = _Recorder()
    NOTICE.enabled = False  # the command reports what it compiles itself
    started = time.perf_counter()
    try:
        with event.install_listener("numba:compile", recorder.listener()):
            if folder is None:
                with tempfile.TemporaryDirectory(prefix="lshjob-kernels-") as tmp:
                    steps = exercise(Path(tmp))
            else:
                steps = exercise(Path(folder))
    finally:
        NOTICE.enabled = True
    return {
        "cache_dir": cache_folder(),
        "compiled": recorder.compiled,
        "kernels_compiled": len({c["kernel"] for c in recorder.compiled}),
        "steps": steps,
        "seconds": round(time.perf_counter() - started, 2),
    }
