"""Load the SQL files shipped inside the package (``lshjob/index/sql``) with importlib.resources."""

from __future__ import annotations

from functools import cache
from importlib import resources

from lshjob.errors import LshjobError

SQL_PACKAGE = "lshjob.index"


def sql_dir():
    """The folder of SQL files as an importlib.resources Traversable."""
    return resources.files(SQL_PACKAGE) / "sql"


@cache
def load_sql(name: str) -> str:
    """The text of ``sql/<name>.sql``."""
    path = sql_dir() / f"{name}.sql"
    if not path.is_file():
        raise LshjobError(f"the SQL file {name}.sql is missing from this installation ({sql_dir()})")
    return path.read_text(encoding="utf-8")


def string_literal(text: str) -> str:
    """A SQL string literal (single quotes doubled), for the few places DuckDB takes no
    bound parameter, such as the target of COPY. Used only for paths lshjob makes itself."""
    return "'" + text.replace("'", "''") + "'"
