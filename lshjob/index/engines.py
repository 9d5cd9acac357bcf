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
    "band": {"local": "lshjob.index.band.local:LocalBand", "spark": "lshjob.index.spark.band:SparkBand"},
    "join": {"duckdb": "lshjob.index.join.duckdb:DuckDBJoin", "spark": "lshjob.index.spark.join:SparkJoin"},
    "verify": {"local": "lshjob.index.verify.local:LocalVerify", "spark": "lshjob.index.spark.verify:SparkVerify"},
}

# Engines that run a whole run, reading and signing the events too (``--engine spark``):
# name -> "module:Class" of the run's steps (:mod:`lshjob.jobs.run_spark`)
PIPELINES = {"spark": "lshjob.index.spark.pipeline:SparkPipeline"}

# Settings an engine reads when it starts (``spark_master``: where the Spark engines run);
# set by :func:`configure` from the run's options.
SETTINGS: dict[str, object] = {}


def configure(**settings) -> None:
    """Set the engines' settings (None leaves a setting unset)."""
    for key, value in settings.items():
        if value is None:
            SETTINGS.pop(key, None)
        else:
            SETTINGS[key] = value


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
    try:
        loaded = import_module(module)
    except ModuleNotFoundError as exc:  # an optional engine's library is not installed
        if exc.name is None or exc.name.split(".")[0] == "lshjob":
            raise
        raise ParameterError(f"the {name} {stage} engine needs {exc.name}, which is not installed "
                             f"(pip install 'lshjob[{name}]')") from exc
    return getattr(loaded, attribute)()


def get_pipeline(name: str):
    """The steps of a whole run on engine ``name`` (its module imported now)."""
    if name not in PIPELINES:
        raise ParameterError(f"--engine must be one of: {', '.join(sorted(PIPELINES))}; got {name!r}")
    module, _, attribute = PIPELINES[name].partition(":")
    try:
        loaded = import_module(module)
    except ModuleNotFoundError as exc:  # the engine's library (pyarrow, pyspark) is not installed
        if exc.name is None or exc.name.split(".")[0] == "lshjob":
            raise
        raise ParameterError(f"--engine {name} needs {exc.name}, which is not installed "
                             f"(pip install 'lshjob[{name}]')") from exc
    return getattr(loaded, attribute)()


def engine_versions(chosen: dict[str, str]) -> dict[str, str]:
    """What the chosen engines report of their libraries (e.g. the Spark version and master),
    for the manifest; engines without ``engine_versions`` report nothing."""
    found: dict[str, str] = {}
    for stage, name in chosen.items():
        report = getattr(get_engine(stage, name), "engine_versions", None)
        if report is not None:
            found.update(report())
    return found


def prepare(chosen: dict[str, str]) -> None:
    """Start what the chosen engines need (their library imported, a Spark session), so a
    missing library or a cluster that does not answer stops the run before any work."""
    for stage, name in chosen.items():
        start = getattr(get_engine(stage, name), "prepare", None)
        if start is not None:
            start()


def check_all(engines: dict[str, str]) -> None:
    """Refuse a mapping of stage to engine name with an unknown stage or name."""
    for stage, name in engines.items():
        check(stage, name)


def _stage(stage: str) -> dict[str, str]:
    if stage not in _ENGINES:
        raise ParameterError(f"engine stage must be one of: {', '.join(STAGES)}; got {stage!r}")
    return _ENGINES[stage]
