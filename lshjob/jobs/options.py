"""The options of ``lshjob run``, declared once: name, type, default, bounds and help.

From :data:`RUN_TABLE` come the defaults of :class:`RunOptions` (the Python API), the keys and
value types of a run configuration file (:func:`config_keys`, read by
:mod:`lshjob.jobs.config`), the command line's options, defaults and ``[default: ...]`` texts
(:mod:`lshjob.cli.run_params`), and the messages refusing a value out of bounds
(``--threshold must be in (0, 1]; got 1.5``). Values are checked where they come in: the
command line and :func:`lshjob.jobs.run.run_job` call :meth:`RunOptions.validate`; inner
functions trust them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields

from lshjob.errors import ParameterError
from lshjob.index import engines as stage_engines
from lshjob.index.join import DEFAULT_MAX_BUCKET, DEFAULT_MAX_CROWD
from lshjob.ingest.spec import EventSpec
from lshjob.plan.banding import check_explicit
from lshjob.plan.choose import PLAN_BY, RECALL_OF, THEORY_PERMS
from lshjob.runtime.budget import parse_size
from lshjob.sign.params import SCHEMES

MAX_TOP_K = 2**31 - 1  # ranks are 32-bit

REQUIRED = type("Required", (), {"__repr__": lambda self: "REQUIRED"})()  # an option with no default

ENGINE_CHOICES = ("local", "spark")  # --engine: every engine-dependent stage on this engine

INPUT, SPEC, OPTIONS = "input", "spec", "options"  # where a value goes: the job's paths, EventSpec, RunOptions


@dataclass(frozen=True)
class Option:
    """One option: ``low``/``high`` bound it (``open_low``/``open_high``: the bound itself is
    out), ``choices`` list its allowed texts; ``default_text`` describes a default of None."""

    name: str
    type: type
    default: object = REQUIRED
    help: str = ""
    low: float | None = None
    high: float | None = None
    open_low: bool = False
    open_high: bool = False
    choices: tuple[str, ...] = ()
    unit: str = ""
    default_text: str | None = None
    config_types: tuple[type, ...] | None = None  # accepted in a configuration file (else from type)
    part: str = OPTIONS
    short: str | None = None
    argument: bool = False

    @property
    def flag(self) -> str:
        return "--" + self.name.replace("_", "-")

    @property
    def required(self) -> bool:
        return self.default is REQUIRED

    @property
    def accepted(self) -> tuple[type, ...]:
        """Value types a configuration file may give (a whole number where a number is asked)."""
        if self.config_types is not None:
            return self.config_types
        return (int, float) if self.type is float else (self.type,)

    @property
    def expected(self) -> str | None:
        """What a value must be, as the error message says it; None: anything of its type."""
        if self.choices:
            return f"one of {', '.join(self.choices)}"
        lo = _number(self.low) if self.low is not None else None
        hi = _number(self.high) if self.high is not None else None
        if lo is not None and hi is not None:
            if self.type is int and not (self.open_low or self.open_high):
                text = f"from {lo} to {hi}"
            else:
                text = f"in {'(' if self.open_low else '['}{lo}, {hi}{')' if self.open_high else ']'}"
        elif lo is not None:
            text = f"greater than {lo}" if self.open_low else ("0 or more" if self.low == 0 else f"at least {lo}")
        elif hi is not None:
            text = f"less than {hi}" if self.open_high else f"at most {hi}"
        else:
            return None
        return f"{text} {self.unit}" if self.unit else text

    def allows(self, value) -> bool:
        if value is None:
            return self.default is None
        if self.choices:
            return value in self.choices
        if self.low is not None and not (value > self.low if self.open_low else value >= self.low):
            return False  # NaN fails too
        return self.high is None or (value < self.high if self.open_high else value <= self.high)

    def check(self, value) -> None:
        """Refuse a value out of bounds: ``--top-k must be from 1 to 2147483647; got 0``."""
        if not self.allows(value):
            shown = repr(value) if isinstance(value, str) or value is None else _number(value)
            raise ParameterError(f"{self.flag} must be {self.expected}; got {shown}")

    @property
    def help_text(self) -> str:
        """The help line, with the default as the command line shows it."""
        if self.required or (self.default is None and self.default_text is None):
            return self.help
        if self.default is None:
            shown = self.default_text
        else:
            shown = _number(self.default) if isinstance(self.default, (int, float)) else self.default
        return f"{self.help}  [default: {shown}]"


def _number(x) -> str:
    """1 for 1.0, 2e9 for 2000000000.0 (as typed), 0.95 as is."""
    if isinstance(x, float) and math.isfinite(x):
        if x == int(x) and abs(x) >= 1e6:
            mantissa, exponent = f"{x:e}".split("e")
            return f"{float(mantissa):g}e{int(exponent)}"
        if x == int(x):
            return str(int(x))
    return str(x)


def _spec_default(name: str):
    return EventSpec.__dataclass_fields__[name].default


RUN_TABLE: tuple[Option, ...] = (  # in the order of lshjob run --help
    Option("events", str, help="Event file, glob or directory.", part=INPUT, argument=True),
    Option("entity", str, help="Entity column (e.g. patron).", part=SPEC),
    Option("element", str, help="Element column (e.g. title).", part=SPEC),
    Option("threshold", float, help="Jaccard similarity a neighbour must reach, in (0, 1].",
           low=0.0, high=1.0, open_low=True),
    Option("out", str, help="Index folder (neighbours.parquet, manifest.json); with --engine spark also a URI "
           "(s3a://, hdfs://, gs://, file://).", part=INPUT, short="-o"),
    Option("top_k", int, 50, "Neighbours kept per entity.", low=1, high=MAX_TOP_K),
    Option("perms", int, None, "Signature length k.", low=1, default_text="chosen by the planner"),
    Option("bands", int, None, "Override the planner: number of bands b.", low=1),
    Option("rows", int, None, "Override the planner: rows per band r.", low=1),
    Option("recall", float, 0.95, "Planner's expected-recall target.", low=0.0, high=1.0,
           open_low=True, open_high=True),
    Option("recall_of", str, "pairs", "What --recall is the recall of: 'pairs' (every pair at or above the "
           "threshold) or 'lists' (the published top-k lists, met by its one-sided 95% lower bound).",
           choices=RECALL_OF),
    Option("count", str, _spec_default("count"), "Column with a count or weight per event.", part=SPEC),
    Option("min_count", float, _spec_default("min_count"), "Keep elements seen at least this often.", part=SPEC),
    Option("on_null", str, _spec_default("on_null"), "Null keys: error or drop.", part=SPEC),
    Option("unicode", str, _spec_default("unicode"),
           "Text keys: 'nfc' (one Unicode normal form) or 'asis' (as given).", part=SPEC),
    Option("sample_size", int, 2000, "Entities the planner samples.", low=2),
    Option("plan_by", str, "candidates", "Planner's rule: 'candidates' (fewest expected candidate pairs) or 'cost' "
           "(least seconds predicted by this machine's cost model, lshjob calibrate).", choices=PLAN_BY),
    Option("seed", int, 1, "Seed of the hash family."),
    Option("scheme", str, "kperm", "Signature scheme: kperm or oph.", choices=SCHEMES),
    Option("max_bucket", int, DEFAULT_MAX_BUCKET, "Skip buckets holding more entities.", low=2),
    Option("max_crowd", int, DEFAULT_MAX_CROWD, "Buckets verified as crowds (long-tailed data, one part, local "
           "verification) may hold this many entities; larger ones are split by the next band, then skipped.",
           low=2),
    Option("max_candidates", float, 2e9, "Refuse plans predicting more candidate pairs.", low=0),
    Option("memory", str, None, "Memory budget, e.g. 8GB; sets that do not fit are read a key range at a time.",
           default_text="half the machine", config_types=(str, int)),
    Option("parts", int, None, "Read the entities in this many key ranges, one at a time.", low=1,
           default_text="as few as --memory allows"),
    Option("wait", float, 0.0, "Seconds to wait while another run holds the output folder's lock (then exit 75).",
           low=0, unit="seconds"),
    Option("scratch", str, None, "Folder for the work files (DuckDB spill, parts), e.g. on another disk.",
           default_text="inside --out"),
    Option("engine", str, "local", "Where the run runs: local (this process) or spark (events read, signed and "
           "indexed on Spark).",
           choices=ENGINE_CHOICES),
    Option("spark_master", str, None, "Spark master URL for --engine spark, e.g. spark://host:7077, yarn, "
           "local[4].", default_text="spark-submit's master, else local[*]"),
)
RUN = {o.name: o for o in RUN_TABLE}


def default_of(name: str):
    return RUN[name].default


def defaults() -> dict:
    """Every optional option's default: what a run gets when neither a flag nor the
    configuration file gives the option."""
    return {o.name: o.default for o in RUN_TABLE if not o.required}


def required() -> list[str]:
    return [o.name for o in RUN_TABLE if o.required]


def config_keys() -> dict[str, tuple[type, ...]]:
    """The keys of a run configuration file (underscored) and the value types each accepts."""
    return {o.name: o.accepted for o in RUN_TABLE}


@dataclass(frozen=True)
class RunOptions:
    """How ``lshjob run`` plans, signs, joins and publishes (defaults: :data:`RUN_TABLE`)."""

    threshold: float
    top_k: int = default_of("top_k")
    perms: int | None = default_of("perms")
    bands: int | None = default_of("bands")
    rows: int | None = default_of("rows")
    recall: float = default_of("recall")
    recall_of: str = default_of("recall_of")  # "lists": the planner's target is the top-k lists' recall
    sample_size: int = default_of("sample_size")
    plan_by: str = default_of("plan_by")  # "cost": the plan of least predicted seconds (lshjob.plan.cost)
    seed: int = default_of("seed")
    scheme: str = default_of("scheme")
    max_bucket: int = default_of("max_bucket")
    max_crowd: int = default_of("max_crowd")  # buckets verification pairs as crowds (lshjob.index.join.base)
    max_candidates: float = default_of("max_candidates")
    memory: str | None = default_of("memory")
    parts: int | None = default_of("parts")  # key ranges held one at a time; None: as the memory budget needs
    wait: float = default_of("wait")  # seconds to wait for another run's lock on the output folder
    scratch: str | None = default_of("scratch")  # folder for the work folder (spill, parts); None: inside the output
    engine: str = default_of("engine")  # "spark": the whole run on Spark (lshjob.jobs.run_spark)
    spark_master: str | None = default_of("spark_master")  # None: spark-submit's master, else local[*]
    # engine of each of the band, join and verify stages, by name (lshjob.index.engines), one
    # by one from the Python API; ``engine`` chooses one name for all three
    engines: dict[str, str] = field(default_factory=lambda: dict(stage_engines.DEFAULT_ENGINES))

    def validate(self) -> None:
        """Check every value against its declared bounds, then the options that go together."""
        for f in fields(self):
            if f.name in RUN:
                RUN[f.name].check(getattr(self, f.name))
        stage_engines.check_all(self.engines)
        if self.spark_master is not None and "spark" not in self.engine_names().values():
            raise ParameterError("--spark-master goes with --engine spark")
        if (self.bands is None) != (self.rows is None):
            raise ParameterError("--bands and --rows go together; give both or neither")
        if self.bands is not None:
            check_explicit(self.perms or THEORY_PERMS, self.bands, self.rows)
        if self.memory is not None:
            parse_size(self.memory)

    def engine_names(self) -> dict[str, str]:
        """The engine of every stage: ``engine`` on all of them when it is not local, else
        ``engines`` (the default where the mapping leaves a stage out)."""
        if self.engine != "local":
            return {stage: self.engine for stage in stage_engines.STAGES}
        return {**stage_engines.DEFAULT_ENGINES, **self.engines}

    def stage_engine(self, stage: str):
        """The engine chosen for ``stage``, its module imported now."""
        return stage_engines.get_engine(stage, self.engine_names()[stage])


def check_options(values: dict) -> None:
    """Check the values of the named options (of any command sharing them) against their bounds."""
    for name, value in values.items():
        RUN[name].check(value)


def run_settings(settings: dict) -> tuple[str, str, EventSpec, RunOptions]:
    """The events, the output folder, the spec and the options of merged settings (every
    option of :data:`RUN_TABLE` given)."""
    spec = EventSpec(**{o.name: settings[o.name] for o in RUN_TABLE if o.part == SPEC})
    options = RunOptions(**{o.name: settings[o.name] for o in RUN_TABLE if o.part == OPTIONS})
    return settings["events"], settings["out"], spec, options


@dataclass(frozen=True, kw_only=True)
class EngineChoice:
    """Where a command that hands its work to a run runs it (``--engine``, ``--spark-master``;
    ``lshjob refresh``): keyword-only fields, after the command's own."""

    engine: str = default_of("engine")
    spark_master: str | None = default_of("spark_master")

    def engine_options(self) -> dict:
        return {"engine": self.engine, "spark_master": self.spark_master}
