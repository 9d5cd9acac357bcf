"""THE slice generator: the signature table of any signing input, a slice of sets at a time.

Three inputs, one loop (:func:`lshjob.core.slicing.slice_bounds`):

* :class:`~lshjob.core.sets.ElementSets` (sorted, deduplicated sets; key ``entity``);
* :class:`SetRows`: membership rows (ingest contract, sorted by the key columns) and the
  names of those key columns (``entity``, and ``segment``/``period`` when present);
* :class:`~lshjob.ingest.loading.GroupedEvents` (events grouped by entity, not deduplicated;
  key ``entity``): its report's counts are complete once the last slice is made.

Each slice is the signature table of :mod:`lshjob.sign.signatures` (key columns,
``signature``, ``set_size``); a writer that streams the slices never holds every signature
(8k bytes a set at k=128). Every input is signed by the same per-element fold
(:mod:`lshjob.sign._fold`), so the three give the same signatures for the same sets.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
import polars as pl

from lshjob.core import slicing
from lshjob.core.hashing import element_hashes
from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.ingest.loading import GroupedEvents
from lshjob.sign._grouped import sign_grouped
from lshjob.sign.signatures import (
    SignatureParams,
    oph_salts,
    run_lengths,
    sign_csr,
    sign_membership,
    signature_column,
)


@dataclass(frozen=True)
class SetRows:
    """ElementSets rows (columns ``keys`` and ``element``, sorted by ``keys``): one set per run
    of equal keys."""

    table: pl.DataFrame
    keys: list[str]


SignRange = Callable[[int, int], tuple[np.ndarray, np.ndarray]]  # (lo, hi) -> (signatures, set sizes)


def sign_slices(source: ElementSets | SetRows | GroupedEvents, params: SignatureParams,
                rows: int | None = None) -> Iterator[pl.DataFrame]:
    """The signature table of every set of ``source``, ``rows`` sets at a time (default
    ``SLICE_ROWS``, read when called); one table without rows when there is no set."""
    rows = slicing.SLICE_ROWS if rows is None else rows
    keys, sign_range = _signer(source, params)
    for lo, hi in slice_bounds(keys.height, rows) if keys.height else [(0, 0)]:
        matrix, sizes = sign_range(lo, hi)
        yield keys.slice(lo, hi - lo).with_columns(
            signature_column(matrix), pl.Series("set_size", sizes, dtype=pl.UInt32))


def sign_sets(sets: pl.DataFrame, keys: list[str], params: SignatureParams) -> pl.DataFrame:
    """ElementSets rows (ingest contract, sorted by keys) -> signature table, all at once."""
    return next(sign_slices(SetRows(sets, keys), params, max(sets.height, 1)))


def _signer(source, params: SignatureParams) -> tuple[pl.DataFrame, SignRange]:
    """The key columns of ``source``'s sets, and a function signing the sets lo..hi-1."""
    if isinstance(source, ElementSets):
        sizes = source.set_sizes
        return pl.DataFrame({"entity": source.keys}), lambda lo, hi: (
            sign_membership(source, np.arange(lo, hi), params), sizes[lo:hi])
    if isinstance(source, SetRows):
        return _set_rows_signer(source, params)
    if isinstance(source, GroupedEvents):
        return _grouped_signer(source, params)
    raise TypeError(f"cannot sign {type(source).__name__}; expected ElementSets, SetRows or GroupedEvents")


def _set_rows_signer(source: SetRows, params: SignatureParams) -> tuple[pl.DataFrame, SignRange]:
    h0 = np.ascontiguousarray(element_hashes(source.table.get_column("element")), dtype=np.uint64)
    sizes = run_lengths(source.table, source.keys)
    offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    keys = source.table.select(source.keys).gather(offsets[:-1])
    return keys, lambda lo, hi: (sign_csr(offsets, h0, np.arange(lo, hi), params), sizes[lo:hi])


def _grouped_signer(grouped: GroupedEvents, params: SignatureParams) -> tuple[pl.DataFrame, SignRange]:
    """Signs and counts distinct elements in one pass (:mod:`lshjob.sign._grouped`); the
    report's membership rows add up as slices are signed."""
    text = np.empty(0, np.uint64) if grouped.text_hashes is None else grouped.text_hashes
    if params.scheme == "oph":
        salts, oph_scheme = oph_salts(params)[:2], True
    else:
        salts, oph_scheme = params.salts(), False
    report = grouped.report
    report.membership_rows = 0
    report.sets = len(grouped.keys)

    def sign_range(lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
        matrix, sizes = sign_grouped(grouped.offsets[lo:hi + 1], grouped.codes, text, salts, params.perms,
                                     oph_scheme)
        report.membership_rows += int(sizes.sum())
        return matrix, sizes

    return pl.DataFrame({"entity": grouped.keys}), sign_range
