"""The ``lshjob`` console script: first starts itself again with glibc's huge-page tunable where
that pays (:mod:`lshjob.runtime.huge_pages`), then takes over SIGINT, SIGTERM and SIGHUP
(:mod:`lshjob.runtime.stopping`) before the command line and its libraries (polars, numba,
DuckDB) are imported. A signal that comes while they load waits until they are loaded (an
exception raised inside a native library's initialisation aborts the process: DuckDB's
nanobind bindings end in "Critical nanobind error" and SIGABRT), then ends the process as
cleanly as one that comes later."""

from __future__ import annotations

import sys

from lshjob.runtime import huge_pages, stopping


def main() -> None:
    huge_pages.restart_with_huge_pages()
    stopping.install()
    try:
        with stopping.held():  # raised once the libraries are loaded, not inside them
            huge_pages.release_held_signals()  # a stop signal that came while it started again
            from lshjob.cli.app import entry_point
    except stopping.Stopped as stop:
        stopping.flush_and_exit(stopping.say(stop, sys.argv[1:]))
    entry_point()
