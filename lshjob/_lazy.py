"""Lazy re-exports for package ``__init__`` files (PEP 562).

A package's ``__init__`` names its public objects and the module each lives in; the module is
imported when a name is first used. So ``import lshjob.core.atomic`` does not load numba's
kernels beside it, and ``import lshjob`` stays light (the console takes the stop signals before
the heavy libraries load).
"""

from __future__ import annotations

import importlib


def exports(package: str, table: dict[str, str]):
    """``(__getattr__, __dir__)`` for ``package``: ``table`` maps a public name to the module
    (relative to the package) that defines it."""

    def __getattr__(name: str):
        if name not in table:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{table[name]}"), name)
        setattr(importlib.import_module(package), name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(table)

    return __getattr__, __dir__
