"""Column statistics from Parquet footers: row counts, null counts and integer bounds
without reading the data.

A Parquet file ends with its metadata (``FileMetaData``), Thrift-encoded with the compact
protocol, then its length (4 bytes, little-endian) and ``PAR1`` (Apache Parquet format
specification, parquet.thrift and README "File format"). Each row group's column chunk may
carry ``Statistics``: ``null_count`` (field 3), ``max_value``/``min_value`` (fields 5 and
6, plain-encoded: a little-endian integer of the physical width for INT32 and INT64) and
whether those bounds are exact (fields 7 and 8). The compact protocol is Apache Thrift's
(thrift/doc/specs/thrift-compact-protocol.md): field headers carry the id delta in the high
nibble and the type in the low one; integers are zigzag varints.

Only what the statistics pass of :func:`lshjob.ingest.spec.validated_events` needs is decoded;
whenever a file lacks a statistic, or a bound is not exact, :func:`footer_stats` returns
None and the caller reads the data instead. Tested against polars' own pass over the data.
"""

from __future__ import annotations

import struct
from pathlib import Path

MAGIC = b"PAR1"
FOOTER_TAIL = 8  # metadata length (int32 LE) + magic
INT32, INT64 = 1, 2  # parquet.thrift Type

# compact protocol types
_TRUE, _FALSE, _BYTE, _I16, _I32, _I64, _DOUBLE, _BINARY, _LIST, _SET, _MAP, _STRUCT = range(1, 13)


class _Reader:
    """A cursor over compact-protocol bytes, decoding structs as {field id: value}."""

    def __init__(self, data: bytes):
        self.data = data
        self.at = 0

    def byte(self) -> int:
        b = self.data[self.at]
        self.at += 1
        return b

    def varint(self) -> int:
        shift = result = 0
        while True:
            b = self.byte()
            result |= (b & 0x7F) << shift
            if b < 0x80:
                return result
            shift += 7

    def zigzag(self) -> int:
        n = self.varint()
        return (n >> 1) ^ -(n & 1)

    def value(self, kind: int):
        if kind in (_TRUE, _FALSE):  # inside a list, booleans are one byte each
            return kind == _TRUE
        if kind == _BYTE:
            return self.byte()
        if kind in (_I16, _I32, _I64):
            return self.zigzag()
        if kind == _DOUBLE:
            self.at += 8
            return None
        if kind == _BINARY:
            n = self.varint()
            self.at += n
            return self.data[self.at - n:self.at]
        if kind in (_LIST, _SET):
            header = self.byte()
            size, element = header >> 4, header & 0x0F
            if size == 15:
                size = self.varint()
            if element in (_TRUE, _FALSE):
                return [self.byte() == 1 for _ in range(size)]
            return [self.value(element) for _ in range(size)]
        if kind == _MAP:
            size = self.varint()
            if size:
                types = self.byte()
                for _ in range(size):
                    self.value(types >> 4)
                    self.value(types & 0x0F)
            return None
        if kind == _STRUCT:
            return self.struct()
        raise ValueError(f"unknown compact protocol type {kind}")

    def struct(self) -> dict:
        fields, last = {}, 0
        while True:
            header = self.byte()
            if header == 0:  # stop
                return fields
            delta, kind = header >> 4, header & 0x0F
            last = last + delta if delta else self.zigzag()
            fields[last] = kind == _TRUE if kind in (_TRUE, _FALSE) else self.value(kind)


def file_metadata(path: str | Path) -> dict:
    """The decoded ``FileMetaData`` of one Parquet file ({field id: value}, nested)."""
    with open(path, "rb") as f:
        f.seek(0, 2)
        size = f.tell()
        if size < 2 * len(MAGIC) + FOOTER_TAIL - len(MAGIC):
            raise ValueError("too short for a Parquet file")
        f.seek(size - FOOTER_TAIL)
        tail = f.read(FOOTER_TAIL)
        if tail[4:] != MAGIC:
            raise ValueError("no Parquet footer")
        length = struct.unpack("<i", tail[:4])[0]
        if length <= 0 or length > size - FOOTER_TAIL:
            raise ValueError("bad footer length")
        f.seek(size - FOOTER_TAIL - length)
        return _Reader(f.read(length)).struct()


def footer_stats(paths: list[Path], columns: list[str], bounds: str | None, unsigned: bool = False) -> dict | None:
    """Rows, null counts of ``columns`` and (for the INT32/INT64 column ``bounds``) its
    smallest and largest value over all files, from their footers: {"rows": int,
    "nulls": {column: int}, "min": int | None, "max": int | None}. None when any file
    or column chunk lacks what is asked (the caller then reads the data). ``unsigned``: the
    column holds unsigned integers, whose ``min_value``/``max_value`` follow the unsigned
    order (parquet.thrift, ColumnOrder) and are read as unsigned."""
    rows, nulls, low, high = 0, dict.fromkeys(columns, 0), None, None
    try:
        for path in paths:
            meta = file_metadata(path)
            rows += meta[3]
            for group in meta.get(4, []):
                seen = set()
                for chunk in group.get(1, []):
                    info = chunk.get(3)
                    if info is None:
                        return None
                    name = ".".join(p.decode() for p in info[3])
                    if name not in nulls:
                        continue
                    stats = info.get(12, {})
                    if 3 not in stats:
                        return None
                    nulls[name] += stats[3]
                    seen.add(name)
                    if name == bounds and group.get(3, 0) > stats[3]:  # some value present
                        if info[1] not in (INT32, INT64) or 5 not in stats or 6 not in stats:
                            return None
                        if stats.get(7) is False or stats.get(8) is False:
                            return None
                        fmt = ("<I" if unsigned else "<i") if info[1] == INT32 else ("<Q" if unsigned else "<q")
                        lo, hi = struct.unpack(fmt, stats[6])[0], struct.unpack(fmt, stats[5])[0]
                        low = lo if low is None else min(low, lo)
                        high = hi if high is None else max(high, hi)
                if seen != set(columns):
                    return None
    except (OSError, ValueError, KeyError, IndexError, TypeError, struct.error):
        return None
    return {"rows": rows, "nulls": nulls, "min": low, "max": high}
