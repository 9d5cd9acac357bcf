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

import math
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from lshjob.errors import InputError, ParameterError, key_text
from lshjob.ingest.files import (  # noqa: F401
    FILE_COLUMN,
    FORMATS,
    agreed_types,
    check_columns,
    combined_scan,
    file_schemas,
    looks_nested,
    plain_integers,
    ragged_line,
    reading,
    refuse_nested,
    resolve_paths,
    scan_one,
    unreadable,
)
from lshjob.ingest.parquet_footer import stats_from_footers

PERIODS = {"day": "1d", "week": "1w", "month": "1mo"}
UNICODE = ("nfc", "asis")


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
    unicode: str = "nfc"  # text keys in Unicode NFC ("nfc") or as given ("asis")

    def __post_init__(self) -> None:
        if self.unicode not in UNICODE:
            raise ParameterError(f"--unicode must be 'nfc' or 'asis'; got {self.unicode!r}")
        if self.on_null not in ("error", "drop"):
            raise ParameterError(f"--on-null must be 'error' or 'drop'; got {self.on_null!r}")
        if self.period is not None and self.period not in PERIODS:
            raise ParameterError(f"--period must be one of {', '.join(PERIODS)}; got {self.period!r}")
        if self.period is not None and self.time is None:
            raise ParameterError("--period needs --time (the column holding each event's time)")
        if self.time is not None and self.period is None:
            raise ParameterError("--time needs --period (day, week or month)")
        if not (math.isfinite(self.min_count) and self.min_count > 0):
            raise ParameterError(f"--min-count must be a finite number > 0; got {self.min_count}")
        roles: dict[str, list[str]] = {}
        for option, name in _named_columns(self):
            roles.setdefault(name, []).append(option)
        shared = [f"{', '.join(o[:-1])} and {o[-1]} name the same column {n!r}" for n, o in roles.items() if len(o) > 1]
        if shared:
            raise ParameterError(f"{'; '.join(shared)}; each role (entity, element, count, segment, time) "
                                 "needs a column of its own")

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
    # the files' columns the job reads, to find which file fails when reading them fails
    columns: list[str] = field(default_factory=list, repr=False)

    def as_dict(self) -> dict:
        return {k: v for k, v in self.__dict__.items() if k not in ("entity_range", "columns")}

    def reading(self, where: str):
        """Context: errors raised while the files stream become an InputError naming the file."""
        return reading(self.files, where, self.columns)

    def add_part(self, part: IngestReport) -> None:
        """Add the counts of one key range's report (a run or signing in parts)."""
        self.membership_rows += part.membership_rows
        self.sets += part.sets
        self.empty_after_filter += part.empty_after_filter
        self.empty_examples = (self.empty_examples + part.empty_examples)[:5]


def load_sets(source: str | Path, spec: EventSpec) -> tuple[pl.DataFrame, IngestReport]:
    """Read events and return membership rows (contract in the module docstring)."""
    frame, report, where = validated_events(source, spec)
    return group_set_rows(frame, spec, where, report), report


def validated_events(source: str | Path, spec: EventSpec,
                     allow_empty: bool = False) -> tuple[pl.LazyFrame, IngestReport, str]:
    """Check the event files against the spec (columns, types, nulls, time text) and return
    the events as a lazy frame of the output columns (entity, [segment], [period], element,
    weight), with the report so far and a short name of the input for messages. With
    ``allow_empty`` (a batch of a night without events) zero rows are no error."""
    paths, fmt = resolve_paths(source)
    where = _where(paths)
    named = _named_columns(spec)
    schemas = file_schemas(paths, fmt, [n for _, n in named] if fmt != "parquet" else [])
    check_columns(paths, schemas, named)
    # a null count is like a null key: refused, or its row dropped with --on-null drop
    key_names = list(dict.fromkeys(n for _, n in named))
    stats = None
    if fmt == "parquet":
        types = agreed_types(paths, schemas, named)
        uniform = all(s == schemas[0] for s in schemas) and all(schemas[0][n] == t for n, t in types.items())
        lf = combined_scan(paths, fmt, schemas, types, {}, uniform)
        if types[spec.entity] == schemas[0][spec.entity]:  # the footers' bounds are of this type
            stats = stats_from_footers(paths, key_names, spec.entity, types[spec.entity])
    else:
        types, stats = _text_files(paths, fmt, schemas, spec, named, key_names)
        lf = combined_scan(paths, fmt, schemas, types, types, all(s == schemas[0] for s in schemas))
    schema = pl.Schema({**types, FILE_COLUMN: pl.String})
    _check_types(where, schema, spec)
    report = IngestReport(files=[str(p) for p in paths], columns=list(dict.fromkeys(n for _, n in named)))
    integer_entity = schema[spec.entity].is_integer()
    if stats is None:  # read the data
        with report.reading(where):
            stats = lf.select(
                pl.len().alias("rows"),
                *[pl.col(n).null_count().alias(n) for n in key_names],
                pl.any_horizontal([pl.col(n).is_null() for n in key_names]).sum().alias("__any_null"),
                *([pl.col(spec.entity).min().alias("__entity_min"), pl.col(spec.entity).max().alias("__entity_max")]
                  if integer_entity else []),
                *([not_a_count(spec.count, schema).sum().alias("__bad_count")] if spec.count else []),
            ).collect()
    report.rows_read = int(stats["rows"][0])
    if integer_entity and stats["__entity_min"][0] is not None:
        report.entity_range = (int(stats["__entity_min"][0]), int(stats["__entity_max"][0]))
    if report.rows_read == 0 and not allow_empty:
        raise InputError(f"{where}: no events (0 rows)")
    if spec.count is not None:
        _check_counts(lf, spec.count, schema, stats, report, where)
    nulls = {n: int(stats[n][0]) for n in key_names if stats[n][0] > 0}
    if nulls:
        if spec.on_null == "error":
            name, count = next(iter(nulls.items()))
            with report.reading(where):
                path, place, _ = _first_row(lf, pl.col(name).is_null(), name)
            raise InputError(
                f"{path}: column {name!r} has {count} null value(s) (first at {place}); "
                "clean the data or pass --on-null drop to skip such rows"
            )
        report.null_rows_dropped = int(stats["__any_null"][0])
        if report.null_rows_dropped == report.rows_read:
            what = "key or count" if spec.count else "key"
            raise InputError(f"{where}: every row had a null {what} and was dropped (--on-null drop); nothing to sign")
        lf = lf.drop_nulls(key_names)
    with report.reading(where):
        if spec.time is not None and schema[spec.time] == pl.String:
            _check_time_strings(lf, spec.time)
        canonical = _canonical_keys(lf, spec, schema)
    return lf.select(_select_exprs(spec, schema, canonical)), report, where


def _text_files(paths: list[Path], fmt: str, schemas: list[pl.Schema], spec: EventSpec,
                named: list[tuple[str, str]], key_names: list[str]) -> tuple[dict, pl.DataFrame]:
    """CSV and NDJSON: one pass over each file with every named column read as text (and,
    for CSV, a pass counting each line's fields). Returns the type each column is read as
    (keys: Int64 when every value is a plain integer, else String; count Float64; time
    String) and the statistics pass's one-row frame."""
    keys = list(dict.fromkeys(n for option, n in named if option in ("--entity", "--element", "--segment")))
    frames = []
    for path, schema in zip(paths, schemas):
        if fmt == "csv":
            line = ragged_line(path, len(schema))
            if line is not None:
                raise InputError(f"{path}: line {line} does not have the header's {len(schema)} fields "
                                 "(a separator inside an unquoted value, or a field missing)")
        lf = scan_one(path, fmt, [n for _, n in named])
        entity = pl.col(spec.entity).cast(pl.Int64, strict=False)
        exprs = [pl.len().alias("rows"), *[pl.col(n).null_count().alias(n) for n in key_names],
                 pl.any_horizontal([pl.col(n).is_null() for n in key_names]).sum().alias("__any_null"),
                 *[plain_integers(n).alias(f"__odd_{n}") for n in keys],
                 entity.min().alias("__entity_min"), entity.max().alias("__entity_max"),
                 *([looks_nested(keys).sum().alias("__nested")] if fmt == "ndjson" else [])]
        if spec.count is not None:
            count = pl.col(spec.count)
            bad = count.is_not_null() & count.cast(pl.Float64, strict=False).is_null()
            exprs += [bad.sum().alias("__not_number"), not_a_count(spec.count).sum().alias("__bad_count")]
        try:
            stats = lf.select(exprs).collect(engine="streaming")
            if fmt == "ndjson" and stats["__nested"][0]:
                refuse_nested(path, lf, {n: o for o, n in named if n in keys})
            if spec.count is not None and stats["__not_number"][0]:
                row = lf.with_row_index("__row").filter(bad).select("__row", spec.count).head(1).collect()
                raise InputError(f"{path}: column {spec.count!r} (--count) value {row[spec.count][0]!r} at "
                                 f"{_line(fmt, row['__row'][0])} is not a number")
        except (pl.exceptions.PolarsError, OSError, pl.exceptions.PanicException) as exc:
            raise unreadable(path, fmt, exc) from exc
        frames.append(stats)
    stats = pl.concat(frames, how="vertical")
    types = {n: pl.String for _, n in named}
    for n in keys:
        if stats[f"__odd_{n}"].sum() == 0 and stats["rows"].sum() > stats[n].sum():
            types[n] = pl.Int64
    if spec.count is not None:
        types[spec.count] = pl.Float64
    total = stats.select(pl.col("rows", "__any_null", *key_names, *(["__bad_count"] if spec.count else [])).sum(),
                         pl.col("__entity_min").min(), pl.col("__entity_max").max())
    return types, total


def not_a_count(name: str, schema: pl.Schema | None = None) -> pl.Expr:
    """True where count column ``name`` holds a negative number, NaN or an infinity (null
    where it is null). ``schema`` None: the column is text, read as a number."""
    if schema is not None and schema[name].is_integer():
        return pl.col(name) < 0
    value = pl.col(name).cast(pl.Float64, strict=False)
    return value.is_nan() | value.is_infinite() | (value < 0)


def _check_counts(lf: pl.LazyFrame, name: str, schema: pl.Schema, stats: pl.DataFrame, report: IngestReport,
                  where: str) -> None:
    """Refuse a count that is negative, NaN or infinite, naming the first one's file and place.
    The statistics pass counted them, unless the footers stood in for it: then only the
    count column is read (one vectorised pass). Zero is a count: seen zero times."""
    with report.reading(where):
        bad = (int(stats["__bad_count"][0]) if "__bad_count" in stats.columns
               else lf.select(not_a_count(name, schema).sum()).collect(engine="streaming").item())
        if bad:
            path, place, value = _first_row(lf, not_a_count(name, schema), name)
            raise InputError(f"{path}: column {name!r} (--count) value {value} at {place} is not a count "
                             f"(expected a finite number >= 0); {bad} such value(s)")


def _line(fmt: str, row: int) -> str:
    """Where row ``row`` (0-based, of the data) is in its file."""
    return f"line {row + 2}" if fmt == "csv" else f"line {row + 1}"


def _canonical_keys(lf: pl.LazyFrame, spec: EventSpec, schema: pl.Schema) -> dict[str, pl.Expr]:
    """Expressions putting the text entity and segment keys in Unicode NFC (``spec.unicode``):
    only values holding a non-ASCII character are looked at (one pass over each column, the
    distinct such values normalised in Python), and only values that change are replaced."""
    if spec.unicode != "nfc":
        return {}
    found = {}
    for name in (spec.entity, spec.segment):
        if name is not None and schema[name] in (pl.String, pl.Categorical):
            expr = nfc_replacement(lf, name)
            if expr is not None:
                found[name] = expr
    return found


def nfc_replacement(lf: pl.LazyFrame, name: str) -> pl.Expr | None:
    """``pl.col(name)`` with every value not in NFC replaced by its NFC form, or None when
    every value is already NFC (all ASCII text is)."""
    text = pl.col(name).cast(pl.String)
    odd = (lf.select(text.filter(text.str.len_bytes() != text.str.len_chars()).unique())
           .collect(engine="streaming")[name].to_list())
    old = [v for v in odd if unicodedata.normalize("NFC", v) != v]
    if not old:
        return None
    return text.replace(old, [unicodedata.normalize("NFC", v) for v in old])


def group_set_rows(frame: pl.LazyFrame, spec: EventSpec, where: str, report: IngestReport,
                 allow_empty: bool = False) -> pl.DataFrame:
    """Events -> membership rows (module contract); adds its counts to ``report``. With
    ``allow_empty`` (one key range of many), no row left after ``--min-count`` is no error."""
    keys = spec.key_columns
    with report.reading(where):
        if spec.unicode == "nfc" and frame.collect_schema()["element"] == pl.String:
            element = nfc_replacement(frame, "element")
            if element is not None:
                frame = frame.with_columns(element)
        grouped = frame.group_by([*keys, "element"]).agg(pl.col("weight").sum()).collect()
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
    """Count and time columns (keys are checked file by file: :func:`event_files.check_columns`)."""
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
    found = _first_row(lf, pl.col(name).str.to_datetime(strict=False).is_null(), name)
    if found is not None:
        path, place, value = found
        raise InputError(
            f"{path}: column {name!r} value {value!r} at {place} is not a date or datetime "
            "(expected ISO-8601, e.g. 2026-03-14)"
        )


def _first_row(lf: pl.LazyFrame, condition: pl.Expr, name: str) -> tuple[str, str, object] | None:
    """(file, place in that file, value of ``name``) of the first row meeting ``condition``,
    or None. The place is a line of a CSV (the header is line 1) or NDJSON file, else a
    row (the first is row 1)."""
    hit = lf.filter(condition).select(FILE_COLUMN).head(1).collect()
    if hit.height == 0:
        return None
    path = hit[FILE_COLUMN][0]
    row = (lf.filter(pl.col(FILE_COLUMN) == path).with_row_index("__row").filter(condition)
           .select("__row", name).head(1).collect())
    fmt = FORMATS.get(Path(path).suffix.lower())
    place = _line(fmt, row["__row"][0]) if fmt in ("csv", "ndjson") else f"row {row['__row'][0] + 1}"
    return path, place, row[name][0]


def _select_exprs(spec: EventSpec, schema: pl.Schema, canonical: dict[str, pl.Expr]) -> list[pl.Expr]:
    entity = canonical.get(spec.entity, pl.col(spec.entity))
    if schema[spec.entity] != pl.String and not schema[spec.entity].is_integer():  # Categorical, Enum
        entity = entity.cast(pl.String)
    exprs = [entity.alias("entity")]
    if spec.segment is not None:
        exprs.append(canonical.get(spec.segment, pl.col(spec.segment)).cast(pl.String).alias("segment"))
    if spec.period is not None:
        t = pl.col(spec.time)
        if schema[spec.time] == pl.String:
            t = t.str.to_datetime(strict=False)
        exprs.append(t.dt.truncate(PERIODS[spec.period]).cast(pl.Date).alias("period"))
    element = pl.col(spec.element)
    if schema[spec.element] != pl.String and not schema[spec.element].is_integer():
        element = element.cast(pl.String)
    exprs.append(element.alias("element"))
    weight = pl.col(spec.count).cast(pl.Float64) if spec.count is not None else pl.lit(1.0)
    exprs.append(weight.alias("weight"))
    return exprs


def _where(paths: list[Path]) -> str:
    if len(paths) == 1:
        return str(paths[0])
    return f"{paths[0]} (and {len(paths) - 1} more file(s))"

