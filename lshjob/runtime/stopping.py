"""Stopping the ``lshjob`` command on SIGTERM, SIGINT or SIGHUP (what cron, systemd, Kubernetes,
``timeout`` and Ctrl-C send): the signal raises :class:`Stopped` in the main thread, so every
``finally`` runs (the work folder, the staging folder and the lock are let go) and the command
ends with one line on stderr and the exit code 128 + the signal's number (130, 143, 129).

Only the ``lshjob`` process installs these handlers (:func:`install`, called by the console
script before the heavy imports); a program that imports lshjob keeps its own. This module
imports nothing but the standard library, so it can be loaded first.

A signal that lands inside compiled code or a DuckDB query comes back out as another error
(numba: ``SystemError ... returned a result with an exception set``; DuckDB: ``Query
interrupted``). Such errors are known for what they are by the signal recorded here
(:func:`received`), not by their text. While the index is renamed into place (:func:`held`)
a signal waits; once the index is published (:func:`mark_published`) the command finishes
and exits 0. A second signal while stopping ends the process at once with the same code.
"""

from __future__ import annotations

import os
import signal
import sys
from contextlib import contextmanager

SIGNALS = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, name))


class Stopped(BaseException):
    """The process was asked to stop by a signal (a BaseException: no ``except Exception``
    swallows it on its way out)."""

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum

    @property
    def exit_code(self) -> int:
        return 128 + self.signum


_state = {"signum": None, "held": False, "published": False, "installed": False}


def received() -> int | None:
    """The number of the signal that asked this process to stop, if one did."""
    return _state["signum"]


def published() -> bool:
    """Whether the run had published its index when the signal came (or at all)."""
    return bool(_state["published"])


def mark_published() -> None:
    """The index is in place: a signal from now on lets the command finish (exit 0)."""
    _state["published"] = True


def _on_signal(signum, frame) -> None:
    if _state["signum"] is not None:  # asked twice: end now (the OS lets go of the lock)
        try:
            os.write(2, f"lshjob: {signal.Signals(signum).name} again; stopped at once\n".encode())
        finally:
            os._exit(128 + _state["signum"])
    _state["signum"] = signum
    if not _state["held"] and not _state["published"]:
        raise Stopped(signum)


def install() -> None:
    """Handle SIGINT, SIGTERM and SIGHUP in this process as :class:`Stopped`. A signal the
    process was started ignoring (``nohup``, a background job's SIGINT) stays ignored."""
    if _state["installed"]:
        return
    _state["installed"] = True
    for signum in SIGNALS:
        if signal.getsignal(signum) is signal.SIG_IGN:
            continue
        signal.signal(signum, _on_signal)


@contextmanager
def held():
    """Let a signal wait until the block is done (the renames that publish an index are all
    made or none). If one came and the block did not publish, it is raised at the end."""
    before = _state["held"]
    _state["held"] = True
    try:
        yield
    finally:
        _state["held"] = before
    if not before and _state["signum"] is not None and not _state["published"]:
        raise Stopped(_state["signum"])


def stopped_by(exc: BaseException) -> Stopped | None:
    """The :class:`Stopped` that ``exc`` is, or that it stands for: any error raised while a
    signal is being acted on (numba's SystemError, DuckDB's interruption, a failed write
    cut short) is the signal's doing."""
    if isinstance(exc, Stopped):
        return exc
    if _state["signum"] is not None and not _state["published"]:
        return Stopped(_state["signum"])
    return None


def message(command: str, stop: Stopped) -> str:
    """The one line that says how far the command got."""
    name = signal.Signals(stop.signum).name
    if command == "run":
        return f"lshjob run: stopped by {name}; nothing was published, the previous index is unchanged"
    return f"lshjob {command}: stopped by {name} before it finished" if command else f"lshjob: stopped by {name}"


def say(stop: Stopped, argv: list[str]) -> int:
    """Report a stop that came before the command line was parsed (while the libraries load):
    the one line on stderr, and the JSON record on stdout under ``--json``; return the code."""
    command = argv[0] if argv and not argv[0].startswith("-") else ""
    text = message(command, stop)
    if command == "run":  # nothing was read yet, let alone published
        text = text.replace("; nothing was published", " before it began; nothing was published")
    for stream, line in ((sys.stderr, f"error: {text}"), (sys.stdout, None)):
        if line is None and "--json" not in argv:
            continue
        try:
            import json  # here, not at the top: the handlers are installed before json loads

            stream.write((line or json.dumps({"error": text, "exit": stop.exit_code})) + "\n")
        except (OSError, ValueError):
            pass
    return stop.exit_code


def flush_and_exit(code: int) -> None:
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(code)


def say_if_late(code: int) -> None:
    """A signal that came after the index was published (it waited for the renames): the run
    is complete; say so on stderr."""
    signum = received()
    if code == 0 and signum is not None and published():
        try:
            sys.stderr.write(f"lshjob: {signal.Signals(signum).name} came after the index was published; "
                             "the run is complete\n")
        except (OSError, ValueError):
            pass
