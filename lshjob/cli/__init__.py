"""The ``lshjob`` command: typer commands over the jobs (:mod:`lshjob.jobs`)."""

from lshjob._lazy import exports

__all__ = [
    "app", "entry_point", "main",
]

__getattr__, __dir__ = exports(__name__, {
    "app": "app",
    "entry_point": "app",
    "main": "console",
})
