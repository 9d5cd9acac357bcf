"""The ``lshjob`` console script: takes over SIGINT, SIGTERM and SIGHUP (:mod:`lshjob.runtime.stopping`)
before the command line and its libraries (polars, numba, DuckDB) are imported, so a signal
that comes while they load ends the process as cleanly as one that comes later."""

from __future__ import annotations

import sys

from lshjob.runtime import stopping


def main() -> None:
    stopping.install()
    try:
        from lshjob.cli.app import entry_point
    except stopping.Stopped as stop:
        stopping.flush_and_exit(stopping.say(stop, sys.argv[1:]))
    entry_point()
