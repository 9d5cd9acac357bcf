"""Load the SQL files shipped with the package.

Installed, they sit in ``lshjob/sql`` (the wheel maps the project's top-level ``sql/``
there); from a source checkout they are read from ``sql/`` beside the package.
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from .errors import LshjobError


def sql_dir() -> Path:
    here = Path(__file__).resolve().parent
    for candidate in (here / "sql", here.parent / "sql"):
        if candidate.is_dir():
            return candidate
    raise LshjobError(f"the SQL files are missing: looked in {here / 'sql'} and {here.parent / 'sql'}")


@lru_cache(maxsize=None)
def load_sql(name: str) -> str:
    """The text of ``sql/<name>.sql``."""
    path = sql_dir() / f"{name}.sql"
    if not path.is_file():
        raise LshjobError(f"the SQL file {path} is missing from this installation")
    return path.read_text()


def string_literal(text: str) -> str:
    """A SQL string literal (single quotes doubled), for the few places DuckDB takes no
    bound parameter, such as the target of COPY. Used only for paths lshjob makes itself."""
    return "'" + text.replace("'", "''") + "'"
