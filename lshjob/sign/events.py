"""Sign one set per entity straight from grouped events: the fast path of ``lshjob sign``.

The run keeps sorted, deduplicated sets, because verification needs them. Signing alone does
not: a signature is a minimum over the set's elements, so a repeated element changes
nothing, and the set size counts distinct elements. So after the loader's counting sort
(:func:`lshjob.ingest.loading.read_grouped`) each entity's events are read once: an element code is
looked up in a small table of the codes already seen in that set (each slot stamped with the
set's number, so the table is never cleared), and a new code is counted, hashed (XXH64 of its
canonical text, :mod:`lshjob.core.hashing`) and folded into the signature (either scheme, same
definitions as :mod:`lshjob.sign.signatures` and :mod:`lshjob.sign.oph`). There is no per-set sort, no
compaction and no array of element hashes. Signatures and set sizes equal those of signing
the loaded Membership, byte for byte (tested).

Inputs with a count column or ``--min-count`` above 1 need per-element totals; they take the
Membership path.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterator

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64
from lshjob.ingest.spec import EventSpec, IngestReport
from lshjob.ingest.loading import GroupedEvents, read_grouped
from lshjob.core.sets import element_hash
from lshjob.sign.oph import EMPTY, fast_range
from lshjob.sign.signatures import SignatureParams, oph_salts, signature_column

CHUNK = 256  # sets per parallel task: one table of seen codes each
GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def applies(spec: EventSpec) -> bool:
    """Whether ``spec`` can be signed on this path (one set per entity, no weights)."""
    return spec.key_columns == ["entity"] and spec.count is None and spec.min_count <= 1


def sign_events(source: str | Path, spec: EventSpec, params: SignatureParams,
                memory: int | None = None) -> tuple[pl.DataFrame, IngestReport]:
    """The signature table (module contract of :mod:`lshjob.sign.signatures`, key ``entity``) of
    every entity's set of elements, and the ingest report."""
    if not applies(spec):
        raise ValueError("sign_events signs unweighted sets, one per entity")
    return sign_grouped(read_grouped(source, spec, memory), params)


def sign_grouped(grouped: GroupedEvents, params: SignatureParams) -> tuple[pl.DataFrame, IngestReport]:
    """:func:`sign_events` after reading: sign the grouped events (one slice of all)."""
    table = next(sign_grouped_slices(grouped, params, max(len(grouped.keys), 1)))
    return table, grouped.report


def sign_grouped_slices(grouped: GroupedEvents, params: SignatureParams, rows: int) -> Iterator[pl.DataFrame]:
    """The signature table of the grouped events, ``rows`` entities at a time (a writer that
    streams them never holds every signature: 8k bytes an entity at k=128). The report's
    counts are complete once the last slice is made."""
    text = grouped.text_hashes
    text = np.empty(0, np.uint64) if text is None else text
    if params.scheme == "oph":
        salts, oph_scheme = oph_salts(params)[:2], True
    else:
        salts, oph_scheme = params.salts(), False
    report = grouped.report
    report.membership_rows = 0
    report.sets = n = len(grouped.keys)
    for lo in range(0, max(n, 1), max(rows, 1)):
        hi = min(n, lo + rows)
        matrix, sizes = _sign_grouped(grouped.offsets[lo:hi + 1], grouped.codes, text, salts, params.perms, oph_scheme)
        report.membership_rows += int(sizes.sum())
        yield pl.DataFrame({"entity": grouped.keys.slice(lo, hi - lo)}).with_columns(
            signature_column(matrix), pl.Series("set_size", sizes, dtype=pl.UInt32)
        )


@numba.njit(parallel=True, cache=True)
def _sign_grouped(offsets, codes, text_hashes, salts, k, oph_scheme):
    n = offsets.shape[0] - 1
    out = np.empty((n, k), dtype=np.uint64)
    sizes = np.zeros(n, dtype=np.int64)
    for c in numba.prange((n + CHUNK - 1) // CHUNK):
        _sign_chunk(c * CHUNK, min(n, (c + 1) * CHUNK), offsets, codes, text_hashes, salts, k, oph_scheme, out, sizes)
    return out, sizes


@numba.njit(cache=True)
def _sign_chunk(lo, hi, offsets, codes, text_hashes, salts, k, oph_scheme, out, sizes):
    """Sets lo..hi-1 (one task: its own table); rows filled in place."""
    largest = 1
    for g in range(lo, hi):
        largest = max(largest, offsets[g + 1] - offsets[g])
    bits = 6
    while (1 << bits) < 2 * largest:
        bits += 1
    seen = np.empty(1 << bits, dtype=np.int64)
    stamp = np.zeros(1 << bits, dtype=np.int64)  # a slot holds a code of set g iff stamp == g + 1
    for g in range(lo, hi):
        a, b = offsets[g], offsets[g + 1]
        bits = 6
        while (1 << bits) < 2 * (b - a):
            bits += 1
        mask = (1 << bits) - 1
        row = out[g]
        row[:] = EMPTY
        count = 0
        for j in range(a, b):
            x = codes[j]
            s = np.int64((np.uint64(x) * GOLDEN) >> np.uint64(64 - bits))
            new = True
            while stamp[s] == g + 1:
                if seen[s] == x:
                    new = False
                    break
                s = (s + 1) & mask
            if not new:
                continue
            stamp[s] = g + 1
            seen[s] = x
            count += 1
            h = element_hash(j, codes, text_hashes)
            if oph_scheme:
                i = fast_range(fmix64(h ^ salts[0]), k)
                v = fmix64(h ^ salts[1])
                if v < row[i]:
                    row[i] = v
            else:
                for i in range(k):
                    v = fmix64(h ^ salts[i])
                    if v < row[i]:
                        row[i] = v
        sizes[g] = count
