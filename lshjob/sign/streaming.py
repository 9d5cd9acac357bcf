"""Writing a signature file from tables made one after another (slices of sets, key ranges),
while they are made: the file is the one writing them at once gives, and only the tables in
flight are held."""

from __future__ import annotations

import time

from polars.io.plugins import register_io_source

from lshjob.core import slicing
from lshjob.core.slicing import slice_bounds
from lshjob.errors import InputError
from lshjob.sign.signatures import write_signatures


def write_streamed(tables, out, meta: dict) -> int:
    """Stream the tables of ``tables`` (an iterator: one key range's rows at a time, in key
    order) into the signature file ``out``. The writer pulls each range's table when it needs
    rows (a polars IO source), so one range is held at a time and nothing goes through
    intermediate files (copying the ranges' files into one took about five times as long;
    measured). Returns the rows written. An error raised while making a range's table is
    raised as it is, not as polars' wrapping of it. A range may have no rows; no range at
    all is refused (nothing written)."""
    pending = iter(tables)
    first = next(pending, None)  # its schema is the file's
    if first is None:  # callers check for rows first; nothing is written without a table
        raise InputError(f"{out}: no rows to write")
    schema = first.schema
    held = [first]
    del first
    rows = [0]
    calls = [0]
    failure: list[BaseException] = []

    def source(with_columns, predicate, n_rows, batch_size):
        calls[0] += 1
        if calls[0] > 1:  # the ranges can be made once only
            raise RuntimeError("the signature writer asked for the key ranges twice")
        try:
            table = held.pop()
            while table is not None:
                rows[0] += table.height
                if predicate is not None:
                    table = table.filter(predicate)
                if with_columns is not None:
                    table = table.select(with_columns)
                # a row group at a time: polars asks for the next range while it still
                # encodes, and by then holds only the last slices of this one
                for lo, hi in slice_bounds(table.height, slicing.SLICE_ROWS):
                    yield table.slice(lo, hi - lo)
                table = None  # let the range written go before the next is made
                table = next(pending, None)
        except Exception as exc:
            failure.append(exc)
            raise

    try:
        write_signatures(register_io_source(source, schema=schema), out, meta)
    except Exception:
        if failure:
            raise failure[0] from None
        raise
    return rows[0]


def timed(items, seconds: dict, key: str):
    """Yield from ``items``, adding the time spent making each item to ``seconds[key]``."""
    items = iter(items)
    while True:
        start = time.perf_counter()
        item = next(items, None)
        seconds[key] += time.perf_counter() - start
        if item is None:
            return
        yield item
