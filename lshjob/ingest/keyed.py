"""Sets per (entity, segment, period) through the streaming loader, by one composite key.

The streaming loader (:mod:`lshjob.ingest.loading`) groups events by one integer key at 8 to 36
bytes an event; polars' group-by over (entity, segment, period, element) takes up to about
230. When the entity keys are integers, each (entity, segment, period) becomes one Int64
key ``((entity - first) x S + segment code) x P + (period's day - first period's day)``:
the segment code is its position among the S sorted distinct segments (polars' Enum over
them), the period is counted in days from the first one, P days in all. So the composite
keys sort as the (entity, segment, period) triples do, a set is one key, and a key range is
a range of entities' sets. The loader then groups, signs and splits into key ranges as it
does for one set per entity, and :meth:`KeyCodec.decode` turns each slice's keys back into
the three columns. Text entity keys, or ranges whose product does not fit, keep polars'
group-by.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import polars as pl

from lshjob.errors import key_text
from lshjob.ingest.loading import EventSource, event_source
from lshjob.ingest.spec import EventSpec, IngestReport

KEY_LIMIT = 2**62  # composite keys stay well inside Int64


@dataclass(frozen=True)
class KeyCodec:
    """How (entity, [segment], [period]) map to one composite Int64 key and back."""

    first: int
    entity_dtype: pl.DataType
    segments: pl.Series | None  # sorted distinct segments, or None without --segment
    first_day: int | None  # the first period, in days since 1970-01-01, or None without --period
    days: int = 1  # periods' span in days (P)

    @property
    def widths(self) -> tuple[int, int]:
        return (1 if self.segments is None else len(self.segments), self.days)

    def encode(self) -> pl.Expr:
        """The composite key of each event, from the columns ``entity``, ``segment``, ``period``."""
        key = pl.col("entity").cast(pl.Int64) - self.first
        if self.segments is not None:
            code = pl.col("segment").cast(pl.Enum(self.segments.to_list())).to_physical().cast(pl.Int64)
            key = key * len(self.segments) + code
        if self.first_day is not None:
            key = key * self.days + (pl.col("period").cast(pl.Int32).cast(pl.Int64) - self.first_day)
        return key

    def decode(self, keys: pl.Series) -> pl.DataFrame:
        """The (entity, [segment], [period]) columns of composite keys."""
        s, p = self.widths
        k = keys.to_numpy().astype(np.int64)
        columns = {"entity": pl.Series("entity", k // (s * p) + self.first).cast(self.entity_dtype)}
        if self.segments is not None:
            columns["segment"] = self.segments.gather(pl.Series((k // p) % s)).alias("segment")
        if self.first_day is not None:
            columns["period"] = pl.Series("period", k % p + self.first_day).cast(pl.Int32).cast(pl.Date)
        return pl.DataFrame(columns)

    def decode_tables(self, tables: Iterator[pl.DataFrame]) -> Iterator[pl.DataFrame]:
        """Signature slices keyed by composite ``entity`` -> keyed by the three columns."""
        for table in tables:
            yield pl.concat([self.decode(table["entity"]), table.drop("entity")], how="horizontal")

    def describe(self, keys: pl.Series) -> list[str]:
        """Keys as the polars path shows them in reports (:func:`lshjob.errors.key_text`)."""
        return [key_text(row) for row in self.decode(keys).rows()]


def keyed_source(frame: pl.LazyFrame, report: IngestReport, where: str,
                 spec: EventSpec) -> tuple[EventSource, KeyCodec] | None:
    """Checked events (:func:`lshjob.ingest.spec.validated_events`) with one composite key per
    (entity, segment, period) as their ``entity`` column, and the codec; None when the
    entity keys are not integers in a range the composite keys can hold (polars' group-by
    takes those). ``report`` is taken over."""
    if report.entity_range is None:
        return None
    first, last = report.entity_range
    segments, first_day, days = None, None, 1
    with report.reading(where):  # a file failing to read is named
        if spec.segment is not None:
            segments = frame.select(pl.col("segment").unique()).collect(engine="streaming")["segment"].sort()
        if spec.period is not None:
            bounds = frame.select(pl.col("period").min().alias("lo"), pl.col("period").max().alias("hi")).collect(
                engine="streaming").cast(pl.Int32)
            first_day, days = int(bounds["lo"][0]), int(bounds["hi"][0]) - int(bounds["lo"][0]) + 1
    codec = KeyCodec(first, frame.collect_schema()["entity"], segments, first_day, days)
    s, p = codec.widths
    if first < -(2**63) or last >= 2**63 or (last - first + 1) * s * p >= KEY_LIMIT:
        return None
    report.entity_range = (0, (last - first + 1) * s * p - 1)
    composite = (frame.with_columns(entity=codec.encode())
                 .drop([c for c in ("segment", "period") if c in spec.key_columns]))
    return event_source(composite, report, where, spec, describe=codec.describe), codec
