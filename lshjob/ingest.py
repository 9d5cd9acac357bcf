"""Ingest stage: event files -> membership rows (one row per key and distinct element).

Output contract of :func:`load_sets` (a polars DataFrame):

* ``entity``: the entity key as given (String or an integer type), never null;
* ``segment`` (String), ``period`` (Date): present only when asked for;
* ``element``: the element key as given (String or an integer type), never null;
* ``weight``: Float64, events (or the summed count column) for that key and element.

Rows are unique on (entity, [segment], [period], element), sorted by the key columns
(order of elements within a set is unspecified), and every row has
``weight >= min_count``. Repeated events therefore count once in the set.
"""

from __future__ import annotations

import glob as globmod
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from .errors import InputError, ParameterError, key_text
from .parquet_footer import footer_stats

FORMATS = {
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv": "csv",
    ".ndjson": "ndjson",
    ".jsonl": "ndjson",
}
PERIODS = {"day": "1d", "week": "1w", "month": "1mo"}
KEY_TYPES = (pl.String, pl.Categorical)
FILE_COLUMN = "__lshjob_file"


@dataclass(frozen=True)
class EventSpec:
    """Which columns of the events hold what, and how to filter them."""

    entity: str
    element: str
    count: str | None = None
    min_count: float = 1
    segment: str | None = None
    time: str | None = None
    period: str | None = None
    on_null: str = "error"

    def __post_init__(self) -> None:
        if self.on_null not in ("error", "drop"):
            raise ParameterError(f"--on-null must be 'error' or 'drop'; got {self.on_null!r}")
        if self.period is not None and self.period not in PERIODS:
            raise ParameterError(f"--period must be one of {', '.join(PERIODS)}; got {self.period!r}")
        if self.period is not None and self.time is None:
            raise ParameterError("--period needs --time (the column holding each event's time)")
        if self.time is not None and self.period is None:
            raise ParameterError("--time needs --period (day, week or month)")
        if self.min_count <= 0:
            raise ParameterError(f"--min-count must be > 0; got {self.min_count}")

    @property
    def key_columns(self) -> list[str]:
        """Output columns that identify one signed set."""
        keys = ["entity"]
        if self.segment is not None:
            keys.append("segment")
        if self.period is not None:
            keys.append("period")
        return keys


@dataclass
class IngestReport:
    """What ingest read and what it left out."""

    files: list[str]
    rows_read: int = 0
    null_rows_dropped: int = 0
    membership_rows: int = 0
    sets: int = 0
    empty_after_filter: int = 0
    empty_examples: list[str] = field(default_factory=list)
    # smallest and largest integer entity key (None for text keys), for the loader; not reported
    entity_range: tuple[int, int] | None = field(default=None, repr=False)

    def as_dict(self) -> dict:
        return {k: v for k, v in self.__dict__.items() if k != "entity_range"}

    def add_part(self, part: "IngestReport") -> None:
        """Add the counts of one key range's report (a run or signing in parts)."""
        self.membership_rows += part.membership_rows
        self.sets += part.sets
        self.empty_after_filter += part.empty_after_filter
        self.empty_examples = (self.empty_examples + part.empty_examples)[:5]


def resolve_paths(source: str | Path) -> tuple[list[Path], str]:
    """Expand one file, a glob or a directory into files of one supported format."""
    text = str(source)
    if any(ch in text for ch in "*?["):
        paths = [Path(p) for p in sorted(globmod.glob(text))]
        if not paths:
            raise InputError(f"{text}: the pattern matches no files")
    else:
        path = Path(text)
        if not path.exists():
            raise InputError(f"{text}: no such file or directory")
        if path.is_dir():
            paths = sorted(p for p in path.iterdir() if p.suffix.lower() in FORMATS and p.is_file())
            if not paths:
                raise InputError(
                    f"{text}: the directory holds no event files "
                    f"(looked for {', '.join(sorted(FORMATS))})"
                )
        else:
            paths = [path]
    formats = set()
    for p in paths:
        fmt = FORMATS.get(p.suffix.lower())
        if fmt is None:
            raise InputError(
                f"{p}: unknown file type {p.suffix!r}; expected one of {', '.join(sorted(FORMATS))}"
            )
        formats.add(fmt)
    if len(formats) > 1:
        raise InputError(f"{text}: mixes file formats ({', '.join(sorted(formats))}); use one format")
    return paths, formats.pop()


def scan_events(source: str | Path) -> tuple[pl.LazyFrame, list[Path]]:
    """Lazily scan event files; a column ``__lshjob_file`` names each row's file."""
    paths, fmt = resolve_paths(source)
    sources = [str(p) for p in paths]
    if fmt == "parquet":
        lf = pl.scan_parquet(sources, include_file_paths=FILE_COLUMN)
    elif fmt == "csv":
        lf = pl.scan_csv(sources, include_file_paths=FILE_COLUMN, try_parse_dates=True)
    else:
        lf = pl.scan_ndjson(sources, include_file_paths=FILE_COLUMN)
    try:
        lf.collect_schema()
    except Exception as exc:  # polars raises several error types for unreadable files
        raise InputError(f"{_where(paths)}: cannot be read as {fmt}: {_short(exc)}") from exc
    return lf, paths


def load_sets(source: str | Path, spec: EventSpec) -> tuple[pl.DataFrame, IngestReport]:
    """Read events and return membership rows (contract in the module docstring)."""
    frame, report, where = validated_events(source, spec)
    return group_events(frame, spec, where, report), report


def validated_events(source: str | Path, spec: EventSpec) -> tuple[pl.LazyFrame, IngestReport, str]:
    """Check the event files against the spec (columns, types, nulls, time text) and return
    the events as a lazy frame of the output columns (entity, [segment], [period], element,
    weight), with the report so far and a short name of the input for messages."""
    lf, paths = scan_events(source)
    where = _where(paths)
    schema = lf.collect_schema()
    columns = [c for c in schema.names() if c != FILE_COLUMN]
    for option, name in _named_columns(spec):
        if name not in columns:
            raise InputError(
                f"{where}: column {name!r} (from {option}) not found; columns are: {', '.join(columns)}"
            )
    _check_types(where, schema, spec)
    report = IngestReport(files=[str(p) for p in paths])
    key_names = [n for _, n in _named_columns(spec) if _ != "--count"]
    integer_entity = schema[spec.entity].is_integer()
    stats = _stats_from_footers(paths, key_names, spec.entity, schema[spec.entity])
    if stats is None:  # read the data
        stats = lf.select(
            pl.len().alias("rows"),
            *[pl.col(n).null_count().alias(n) for n in key_names],
            pl.any_horizontal([pl.col(n).is_null() for n in key_names]).sum().alias("__any_null"),
            *([pl.col(spec.entity).min().alias("__entity_min"), pl.col(spec.entity).max().alias("__entity_max")]
              if integer_entity else []),
        ).collect()
    report.rows_read = int(stats["rows"][0])
    if integer_entity and stats["__entity_min"][0] is not None:
        report.entity_range = (int(stats["__entity_min"][0]), int(stats["__entity_max"][0]))
    if report.rows_read == 0:
        raise InputError(f"{where}: no events (0 rows)")
    nulls = {n: int(stats[n][0]) for n in key_names if stats[n][0] > 0}
    if nulls:
        if spec.on_null == "error":
            name, count = next(iter(nulls.items()))
            first = (
                lf.with_row_index("__row")
                .filter(pl.col(name).is_null())
                .select("__row", FILE_COLUMN)
                .head(1)
                .collect()
            )
            raise InputError(
                f"{first[FILE_COLUMN][0]}: column {name!r} has {count} null value(s) "
                f"(first at row {first['__row'][0]} of the input); "
                "clean the data or pass --on-null drop to skip such rows"
            )
        report.null_rows_dropped = int(stats["__any_null"][0])
        lf = lf.drop_nulls(key_names)
    if spec.time is not None and schema[spec.time] == pl.String:
        _check_time_strings(lf, spec.time)
    return lf.select(_select_exprs(spec, schema)), report, where


def _stats_from_footers(paths: list[Path], key_names: list[str], entity: str,
                        entity_type: pl.DataType) -> pl.DataFrame | None:
    """The statistics pass's one-row frame from the Parquet files' footers, without reading
    the data (:mod:`lshjob.parquet_footer`); None unless every file is Parquet and states
    what is needed, and no key is null (nulls are then found, and reported, by reading)."""
    if not all(p.suffix.lower() in (".parquet", ".pq") for p in paths):
        return None
    integer = entity_type.is_integer()
    found = footer_stats(paths, key_names, entity if integer else None, unsigned=integer and not entity_type.is_signed_integer())
    if found is None or any(found["nulls"].values()) or (integer and found["rows"] and found["min"] is None):
        return None
    return pl.DataFrame({"rows": [found["rows"]], **{n: [0] for n in key_names}, "__any_null": [0],
                         "__entity_min": [found["min"]], "__entity_max": [found["max"]]})


def group_events(frame: pl.LazyFrame, spec: EventSpec, where: str, report: IngestReport,
                 allow_empty: bool = False) -> pl.DataFrame:
    """Events -> membership rows (module contract); adds its counts to ``report``. With
    ``allow_empty`` (one key range of many), no row left after ``--min-count`` is no error."""
    keys = spec.key_columns
    try:
        grouped = frame.group_by([*keys, "element"]).agg(pl.col("weight").sum()).collect()
    except pl.exceptions.PolarsError as exc:
        raise InputError(f"{where}: could not read the events: {_short(exc)}") from exc
    sets = grouped.filter(pl.col("weight") >= spec.min_count).sort(keys)
    if sets.height == 0 and not allow_empty:
        raise InputError(
            f"{where}: no element is left after filtering (--min-count {spec.min_count}); "
            "nothing to sign"
        )
    n_sets = sets.select(keys).n_unique() if len(keys) > 1 else sets["entity"].n_unique()
    if sets.height < grouped.height:
        empty = grouped.select(keys).unique().join(sets.select(keys).unique(), on=keys, how="anti")
        report.empty_after_filter += empty.height
        report.empty_examples = (report.empty_examples + [key_text(r) for r in empty.sort(keys).head(5).rows()])[:5]
    report.membership_rows += sets.height
    report.sets += n_sets
    return sets


def _named_columns(spec: EventSpec) -> list[tuple[str, str]]:
    named = [("--entity", spec.entity), ("--element", spec.element)]
    for option, name in (("--count", spec.count), ("--segment", spec.segment), ("--time", spec.time)):
        if name is not None:
            named.append((option, name))
    return named


def _check_types(where: str, schema: pl.Schema, spec: EventSpec) -> None:
    def key_ok(dtype: pl.DataType) -> bool:
        return dtype.is_integer() or dtype in KEY_TYPES

    for option, name in (("--entity", spec.entity), ("--element", spec.element), ("--segment", spec.segment)):
        if name is not None and not key_ok(schema[name]):
            raise InputError(
                f"{where}: column {name!r} ({option}) has type {schema[name]}; "
                "expected text or integer keys"
            )
    if spec.count is not None and not schema[spec.count].is_numeric():
        raise InputError(
            f"{where}: column {spec.count!r} (--count) has type {schema[spec.count]}; expected a number"
        )
    if spec.time is not None:
        dtype = schema[spec.time]
        if not (dtype.is_temporal() and dtype != pl.Duration and dtype != pl.Time) and dtype != pl.String:
            raise InputError(
                f"{where}: column {spec.time!r} (--time) has type {dtype}; "
                "expected a date, a datetime or ISO-8601 text"
            )


def _check_time_strings(lf: pl.LazyFrame, name: str) -> None:
    bad = (
        lf.with_row_index("__row")
        .filter(pl.col(name).str.to_datetime(strict=False).is_null())
        .select("__row", FILE_COLUMN, name)
        .head(1)
        .collect()
    )
    if bad.height:
        raise InputError(
            f"{bad[FILE_COLUMN][0]}: column {name!r} value {bad[name][0]!r} at row "
            f"{bad['__row'][0]} is not a date or datetime (expected ISO-8601, e.g. 2026-03-14)"
        )


def _select_exprs(spec: EventSpec, schema: pl.Schema) -> list[pl.Expr]:
    entity = pl.col(spec.entity)
    if schema[spec.entity] == pl.Categorical:
        entity = entity.cast(pl.String)
    exprs = [entity.alias("entity")]
    if spec.segment is not None:
        exprs.append(pl.col(spec.segment).cast(pl.String).alias("segment"))
    if spec.period is not None:
        t = pl.col(spec.time)
        if schema[spec.time] == pl.String:
            t = t.str.to_datetime(strict=False)
        exprs.append(t.dt.truncate(PERIODS[spec.period]).cast(pl.Date).alias("period"))
    element = pl.col(spec.element)
    if schema[spec.element] == pl.Categorical:
        element = element.cast(pl.String)
    exprs.append(element.alias("element"))
    weight = pl.col(spec.count).cast(pl.Float64) if spec.count is not None else pl.lit(1.0)
    exprs.append(weight.alias("weight"))
    return exprs


def _where(paths: list[Path]) -> str:
    if len(paths) == 1:
        return str(paths[0])
    return f"{paths[0]} (and {len(paths) - 1} more file(s))"


def _short(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
