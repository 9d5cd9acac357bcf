"""Engines of the band, join and verify stages, chosen by name.

Each stage has an interface (``lshjob/index/<stage>/base.py``) and one module per engine. The
registry maps a name to ``"module:Class"``; :func:`get_engine` imports the module only when
the engine is chosen, so an optional engine's library (pyspark, say) is imported only by the
runs that use it. A package adding an engine calls :func:`register`, and the engine passes
the checks of :mod:`lshjob.index.conformance`.
"""

from __future__ import annotations

from importlib import import_module

from lshjob.errors import ParameterError

STAGES = ("band", "join", "verify")

DEFAULT_ENGINES = {"band": "local", "join": "duckdb", "verify": "local"}

_ENGINES: dict[str, dict[str, str]] = {
    "band": {"local": "lshjob.index.band.local:LocalBand"},
    "join": {"duckdb": "lshjob.index.join.duckdb:DuckDBJoin"},
    "verify": {"local": "lshjob.index.verify.local:LocalVerify"},
}


def names(stage: str) -> list[str]:
    """The engine names registered for ``stage``, sorted."""
    return sorted(_stage(stage))


def register(stage: str, name: str, target: str) -> None:
    """Make ``name`` an engine of ``stage``: ``target`` is ``"package.module:Class"``, imported
    when chosen; the class has a no-argument constructor."""
    module, sep, attribute = target.partition(":")
    if not (sep and module and attribute):
        raise ParameterError(f"engine target must be 'module:Class'; got {target!r}")
    _stage(stage)[name] = target


def check(stage: str, name: str) -> None:
    """Refuse an unknown engine name, listing the valid ones (nothing is imported)."""
    engines = _stage(stage)
    if name not in engines:
        raise ParameterError(f"{stage} engine must be one of: {', '.join(sorted(engines))}; got {name!r}")


def get_engine(stage: str, name: str):
    """An instance of the ``name`` engine of ``stage`` (its module imported now)."""
    check(stage, name)
    module, _, attribute = _ENGINES[stage][name].partition(":")
    return getattr(import_module(module), attribute)()


def check_all(engines: dict[str, str]) -> None:
    """Refuse a mapping of stage to engine name with an unknown stage or name."""
    for stage, name in engines.items():
        check(stage, name)


def _stage(stage: str) -> dict[str, str]:
    if stage not in _ENGINES:
        raise ParameterError(f"engine stage must be one of: {', '.join(STAGES)}; got {stage!r}")
    return _ENGINES[stage]
