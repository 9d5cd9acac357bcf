"""Event files -> one lazy frame of the named columns, with one type per column.

Only the columns the spec names are read, so a file that gained or lost other columns
reads like the rest. Each file's schema is read first (the footer of a Parquet file, the
header and first rows of a CSV or NDJSON file): a file lacking a named column, or holding a
key of a type that cannot be a key (floats, lists, structs), is refused by name.

Key types across files and formats (README, ``lshjob sign``):

* Parquet keys keep their type; when the files disagree (integers in one, text in
  another; or unsigned 64-bit integers beside signed ones), the column is read as text in
  all of them. An integer element hashes like its decimal text, so the signatures do not
  change; integer entity keys become their decimal text.
* CSV and NDJSON key columns are read as text, so a column that looks numeric for thousands
  of rows and then holds a word cannot fail half-way. A key column is then read as integers
  only when every value in every file is an integer written plainly (``42``, ``-7``: what
  the integer prints as; not ``007``, ``+7`` or ``1.0``), so reading it either way gives the
  same keys and the same signatures.

Errors polars raises while the data streams (a corrupt page behind an intact footer, a
parse error) are turned into :class:`~lshjob.errors.InputError` naming the file by
:func:`reading`: with several files, each is read alone until the one that fails is found.
"""

from __future__ import annotations

import glob as globmod
import json
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import polars as pl

from lshjob.errors import InputError

FORMATS = {
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv": "csv",
    ".ndjson": "ndjson",
    ".jsonl": "ndjson",
}
FILE_COLUMN = "__lshjob_file"
KEY_OPTIONS = ("--entity", "--element", "--segment")
# what polars raises while reading: its own errors, the file system's, and panics of its
# readers (pyo3's PanicException derives from BaseException)
READ_ERRORS = (pl.exceptions.PolarsError, OSError, pl.exceptions.PanicException)


def resolve_paths(source: str | Path) -> tuple[list[Path], str]:
    """Expand one file, a glob or a directory into files of one supported format. A
    directory's files whose names start with ``.`` or ``_`` are skipped (hidden files, an
    uploader's partial files, ``_SUCCESS`` markers: common practice for data folders); a
    file or glob that names such a file reads it (a glob's ``*`` skips names starting with
    ``.``, as in the shell)."""
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
            paths = sorted(p for p in path.iterdir()
                           if p.suffix.lower() in FORMATS and not p.name.startswith((".", "_")) and p.is_file())
            if not paths:
                raise InputError(
                    f"{text}: the directory holds no event files "
                    f"(looked for {', '.join(sorted(FORMATS))}; names starting with . or _ are skipped)"
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


def scan_one(path: Path, fmt: str, text_columns: list[str] | None = None,
             overrides: dict | None = None) -> pl.LazyFrame:
    """One file, lazily: ``text_columns`` read as text (CSV, NDJSON), ``overrides`` as typed."""
    types = {**{c: pl.String for c in text_columns or []}, **(overrides or {})}
    if fmt == "parquet":
        return pl.scan_parquet(path)
    if fmt == "csv":
        return pl.scan_csv(path, schema_overrides=types or None, raise_if_empty=True)
    if types:  # only the columns the file has: polars refuses overrides of absent ones
        try:
            names = pl.scan_ndjson(path).collect_schema().names()
            types = {c: t for c, t in types.items() if c in names}
        except READ_ERRORS:
            pass  # the scan below reports it
    return pl.scan_ndjson(path, schema_overrides=types or None)


def file_schemas(paths: list[Path], fmt: str, text_columns: list[str]) -> list[pl.Schema]:
    """Each file's schema, or an InputError naming the file that cannot be read as ``fmt``."""
    schemas = []
    for path in paths:
        try:
            schemas.append(scan_one(path, fmt, text_columns).collect_schema())
        except (*READ_ERRORS, ValueError) as exc:
            raise unreadable(path, fmt, exc) from exc
    return schemas


def check_columns(paths: list[Path], schemas: list[pl.Schema], named: list[tuple[str, str]]) -> None:
    """Every file holds every named column, and key columns hold text or integers."""
    for path, schema in zip(paths, schemas):
        names = schema.names()
        for option, name in named:
            if name not in names:
                raise InputError(f"{path}: column {name!r} (from {option}) not found; columns are: {', '.join(names)}")
            if option in KEY_OPTIONS and not key_type(schema[name]):
                raise InputError(f"{path}: column {name!r} ({option}) has type {schema[name]}; "
                                 "expected text or integer keys")


def key_type(dtype: pl.DataType) -> bool:
    return dtype.is_integer() or dtype in (pl.String, pl.Categorical) or isinstance(dtype, pl.Enum)


def agreed_types(paths: list[Path], schemas: list[pl.Schema], named: list[tuple[str, str]]) -> dict:
    """One type per named column (module docstring): keys as text when the files disagree;
    other columns must agree (a time column of two types is refused, naming both files)."""
    types = {}
    for option, name in named:
        seen = [s[name] for s in schemas]
        if all(t == seen[0] for t in seen):
            types[name] = seen[0]
        elif option in KEY_OPTIONS:
            integers = all(t.is_integer() for t in seen)
            types[name] = pl.Int64 if integers and pl.UInt64 not in seen else (
                pl.UInt64 if integers and all(not t.is_signed_integer() for t in seen) else pl.String)
        elif option == "--count" and all(t.is_numeric() for t in seen):
            types[name] = pl.Float64
        else:
            j = next(i for i, t in enumerate(seen) if t != seen[0])
            raise InputError(f"{paths[0]}: column {name!r} ({option}) has type {seen[0]}, but {paths[j]} has "
                             f"{seen[j]}; the files must agree")
    return types


def combined_scan(paths: list[Path], fmt: str, schemas: list[pl.Schema], types: dict,
                  overrides: dict, same: bool) -> pl.LazyFrame:
    """All files as one lazy frame of the named columns (``types``) and FILE_COLUMN.

    Files of the ``same`` schema, whose named columns have the agreed types (or are read as
    ``overrides`` say), are one multi-file scan (polars' fastest way); otherwise each file is
    scanned and cast, and the scans are concatenated."""
    names = list(types)
    sources = [str(p) for p in paths]
    if same and fmt == "parquet":
        lf = pl.scan_parquet(sources, include_file_paths=FILE_COLUMN)
    elif same and fmt == "csv":
        lf = pl.scan_csv(sources, include_file_paths=FILE_COLUMN, schema_overrides=overrides, raise_if_empty=True)
    elif same:
        lf = pl.scan_ndjson(sources, include_file_paths=FILE_COLUMN, schema_overrides=overrides)
    else:
        parts = []
        for path, schema in zip(paths, schemas):
            lf = scan_one(path, fmt, overrides=overrides if fmt != "parquet" else None)
            have = lf.collect_schema() if fmt != "parquet" else schema
            parts.append(lf.select(*[pl.col(n) if have[n] == types[n] else _cast(n, have[n], types[n])
                                     for n in names], pl.lit(str(path)).alias(FILE_COLUMN)))
        return pl.concat(parts, how="vertical")
    return lf.select(*names, FILE_COLUMN)


def _cast(name: str, have: pl.DataType, want: pl.DataType) -> pl.Expr:
    if want == pl.String and have == pl.Categorical:
        return pl.col(name).cast(pl.String)
    return pl.col(name).cast(want)


def plain_integers(name: str) -> pl.Expr:
    """Count of non-null values of text column ``name`` that are not an integer written
    plainly (as the integer prints)."""
    col = pl.col(name)  # polars reads "+5", "05" and "-0" as integers too: not plain
    return (col.is_not_null() & (col.cast(pl.Int64, strict=False).is_null()
                                 | col.str.contains(r"^(?:\+|-?0[0-9]|-0$)"))).sum()


def looks_nested(keys: list[str]) -> pl.Expr:
    """True where an NDJSON key column read as text starts like a JSON object or array:
    polars gives a nested value as its JSON text. Only such rows are looked at again."""
    return pl.any_horizontal([pl.col(n).str.starts_with("{") | pl.col(n).str.starts_with("[") for n in keys])


def refuse_nested(path: Path, lf: pl.LazyFrame, keys: dict[str, str]) -> None:
    """Raise naming the first line of an NDJSON file whose key (``keys``: column -> option)
    is a JSON object or array. The rows whose text looks so are found by polars; their lines
    are parsed again in Python (only they), so a text value like "[Untitled]" passes."""
    rows = set(lf.with_row_index("__row").filter(looks_nested(list(keys))).select("__row")
               .collect()["__row"].to_list())
    row = -1
    with open(path, "rb") as f:
        for number, line in enumerate(f, 1):
            if not line.strip():
                continue
            row += 1
            if row in rows:
                try:
                    record = json.loads(line)
                except ValueError:
                    continue
                for name, option in keys.items():
                    if isinstance(record.get(name), (dict, list)):
                        kind = "an object" if isinstance(record[name], dict) else "an array"
                        raise InputError(f"{path}: line {number}: column {name!r} ({option}) holds {kind}, "
                                         f"{short_text(json.dumps(record[name]))}; keys must be text or integers")


def short_text(text: str, limit: int = 40) -> str:
    return text if len(text) <= limit else text[:limit] + "..."


def ragged_line(path: Path, fields: int) -> int | None:
    """The first line (1-based, the header is line 1) of a CSV file whose field count is not
    ``fields``, or None. Fields are counted by separators outside double quotes; a file with
    a quoted line break is not checked (polars reads those lines whole). One pass counting
    separators per line; lines with quotes, or a count found wrong, take a second pass."""
    try:
        lines = pl.scan_csv(path, has_header=False, separator="\x1f", quote_char=None, infer_schema=False,
                            new_columns=["line"], truncate_ragged_lines=True)
        line = pl.col("line").str.strip_chars_end("\r")
        commas = line.str.count_matches(",", literal=True)
        first = lines.select(commas.min().alias("lo"), commas.max().alias("hi"),
                             line.str.contains('"', literal=True).any().alias("quoted")).collect(engine="streaming")
        if not first["quoted"][0] and first["lo"][0] == first["hi"][0] == fields - 1:
            return None
        quoted = line.str.contains('"', literal=True)
        unquoted = line.str.replace_all(r'"(?:[^"]|"")*"', "").str.count_matches(",", literal=True)
        found = (lines.with_row_index("__line", offset=1)
                 .filter(line.is_not_null() & (line != ""))
                 .with_columns(n=pl.when(quoted).then(unquoted).otherwise(commas) + 1,
                               open=quoted & (line.str.count_matches('"', literal=True) % 2 == 1))
                 .select(pl.col("open").any(), pl.col("__line").filter(pl.col("n") != fields).first().alias("bad"))
                 .collect(engine="streaming"))
    except READ_ERRORS:
        return None  # polars' own reading reports it
    if found["open"][0]:
        return None
    return found["bad"][0]


def locate(paths: list[Path], fmt: str, columns: list[str], exc: BaseException, where: str) -> InputError:
    """An InputError naming the file whose reading raised ``exc``: each file is read alone
    (its named ``columns``, as text) until one fails."""
    if len(paths) > 1:
        for path in paths:
            try:
                lf = scan_one(path, fmt, columns if fmt != "parquet" else None)
                lf.select([c for c in columns if c in lf.collect_schema().names()]).collect(engine="streaming")
            except READ_ERRORS as err:
                return unreadable(path, fmt, err)
    return unreadable(paths[0], fmt, exc) if len(paths) == 1 else InputError(
        f"{where}: cannot be read as {fmt}: {short(exc)}")


def unreadable(path: Path, fmt: str, exc: BaseException) -> InputError:
    """The error for a file polars cannot read; for NDJSON with the first line that is not
    JSON (found by reading the file again, only on this path)."""
    where = ""
    found = bad_utf8_line(path) if fmt in ("csv", "ndjson") and "utf-8" in str(exc).lower() else None
    if found:
        return InputError(f"{path}: cannot be read as {fmt}: not UTF-8 text: byte 0x{found[1]:02x} at line "
                          f"{found[0]}; save the file as UTF-8")
    if fmt == "ndjson":
        line = bad_json_line(path)
        where = f" (line {line} is not a JSON object)" if line is not None else ""
    return InputError(f"{path}: cannot be read as {fmt}: {short(exc)}{where}")


def bad_utf8_line(path: Path) -> tuple[int, int] | None:
    """(line, byte) of the first byte of a text file that is not UTF-8, or None. Read again
    in binary, only when reading the file failed (a newline byte is never inside a UTF-8
    sequence, so each line decodes alone)."""
    try:
        with open(path, "rb") as f:
            for number, line in enumerate(f, 1):
                try:
                    line.decode("utf-8")
                except UnicodeDecodeError as exc:
                    return number, line[exc.start]
    except OSError:
        return None
    return None


def bad_json_line(path: Path) -> int | None:
    """The first non-blank line of an NDJSON file that is not a JSON object (1-based), or None."""
    try:
        with open(path, "rb") as f:
            for number, line in enumerate(f, 1):
                if line.strip():
                    try:
                        if not isinstance(json.loads(line), dict):
                            return number
                    except ValueError:
                        return number
    except OSError:
        return None
    return None


@contextmanager
def reading(files: list[str], where: str, columns: list[str]) -> Iterator[None]:
    """Turn errors raised while the files stream into an InputError naming the file."""
    try:
        yield
    except READ_ERRORS as exc:
        paths = [Path(f) for f in files]
        fmt = FORMATS.get(paths[0].suffix.lower(), "events") if paths else "events"
        raise locate(paths, fmt, columns, exc, where) from exc


def short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
