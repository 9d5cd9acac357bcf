"""A contract: a table's columns with their types, and the rules every row (or the table as a
whole) keeps, written once and checked wherever the table crosses a stage boundary.

A rule is ``(text, expression)``: the expression is True on every row that keeps the rule
(null counts as broken). An expression that depends on the run (the threshold, the number of
bands) is a function of those values by name, ``lambda threshold: pl.col("jaccard") >= threshold``;
:meth:`Contract.check` evaluates it with the values it is given and leaves out a rule whose
values it is not given (:meth:`Contract.rules_needing` says which those are).

Types: a polars type, or :data:`KEY` (an entity key: text, or the integer type of the input,
as ingest gives it) or :data:`ELEMENT` (text or integer). Optional columns (``segment``,
``period``) are named in ``optional``; every other column must be there, and no other.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from dataclasses import dataclass, field

import polars as pl

from lshjob.errors import LshjobError


class ContractError(LshjobError):
    """A table broke its contract: a bug in the stage that made it (exit code 70), or a file
    lshjob did not write (the caller says so)."""

    exit_code = 70


@dataclass(frozen=True)
class AnyOf:
    """A column type given by the input: text or any integer type (``name`` in messages)."""

    name: str

    def accepts(self, dtype: pl.DataType) -> bool:
        return dtype == pl.String or dtype.is_integer()

    def __str__(self) -> str:
        return self.name


KEY = AnyOf("key (String or integer)")
ELEMENT = AnyOf("element (String or integer)")
Rule = tuple[str, pl.Expr | Callable[..., pl.Expr]]


@dataclass(frozen=True)
class Contract:
    """A table passed between stages: ``schema`` (column -> type), ``rules`` (module
    docstring), who makes it (``producer``) and who reads it (``consumer``), and a line
    saying what a row is (``row``)."""

    name: str
    schema: dict[str, pl.DataType | AnyOf]
    rules: list[Rule] = field(default_factory=list)
    optional: tuple[str, ...] = ()
    row: str = ""
    producer: str = ""
    consumer: str = ""

    def rules_needing(self) -> dict[str, tuple[str, ...]]:
        """Each rule's text -> the run's values it needs (empty when none)."""
        return {text: _needs(rule) for text, rule in self.rules}

    def check(self, frame: pl.DataFrame, **values) -> pl.DataFrame:
        """Raise :class:`ContractError` (one line: contract, column, offending value) unless
        ``frame`` has the contract's columns and types and keeps every rule; return it."""
        self.check_schema(frame.schema)
        for text, rule in self.rules:
            needs = _needs(rule)
            if any(values.get(n) is None for n in needs):
                continue
            expr = rule(**{n: values[n] for n in needs}) if needs else rule
            named = list(dict.fromkeys(expr.meta.root_names()))
            if any(c in self.optional and c not in frame.columns for c in named):
                continue  # a rule of a column this table does not have
            columns = [c for c in frame.columns if c in named] or [
                c for c, t in frame.schema.items() if not t.is_nested()]
            broken = frame.with_row_index("__row").filter(~expr.fill_null(False))
            if broken.height:
                first = broken.row(0, named=True)
                shown = ", ".join(f"{c}={first[c]!r}" for c in columns)
                raise ContractError(
                    f"{self.name}: rule '{text}' broken by {broken.height} row(s); first at row "
                    f"{first['__row']}: {shown}")
        return frame

    def check_schema(self, schema: pl.Schema | dict) -> None:
        names = list(schema)
        missing = [c for c in self.schema if c not in names and c not in self.optional]
        extra = [c for c in names if c not in self.schema]
        if missing or extra:
            what = f"column '{missing[0]}' missing" if missing else f"column '{extra[0]}' not in the contract"
            raise ContractError(f"{self.name}: {what}; columns are: {', '.join(names)}; "
                                f"expected: {', '.join(self.schema)}")
        for c in names:
            want, got = self.schema[c], schema[c]
            if not (want.accepts(got) if isinstance(want, AnyOf) else got == want):
                raise ContractError(f"{self.name}: column '{c}' has type {got}; expected {want}")

    def empty(self, key: pl.DataType = pl.String, element: pl.DataType = pl.String,
              columns: list[str] | None = None) -> pl.DataFrame:
        """The table with no row: the contract's types (``key``/``element`` for those given by
        the input), its required columns and those of ``columns`` named."""
        names = [c for c in self.schema if c not in self.optional or (columns and c in columns)]
        return pl.DataFrame(schema={c: self._dtype(c, key, element) for c in names})

    def conform(self, frame: pl.DataFrame) -> pl.DataFrame:
        """``frame``'s columns in the contract's order, each cast to the contract's type (the
        input's own type for keys and elements)."""
        return frame.select([pl.col(c) if isinstance(t, AnyOf) else pl.col(c).cast(t)
                             for c, t in self.schema.items() if c in frame.columns])

    def _dtype(self, column: str, key: pl.DataType, element: pl.DataType) -> pl.DataType:
        want = self.schema[column]
        if want is KEY:
            return key
        return element if want is ELEMENT else want


def _needs(rule) -> tuple[str, ...]:
    if isinstance(rule, pl.Expr):
        return ()
    return tuple(inspect.signature(rule).parameters)
