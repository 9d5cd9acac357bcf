"""Sign one set per entity straight from grouped events: the fast path of ``lshjob sign``.

The run keeps sorted, deduplicated sets, because verification needs them. Signing alone does
not: a signature is a minimum over the set's elements, so a repeated element changes
nothing, and the set size counts distinct elements. So after the loader's counting sort
(:func:`lshjob.ingest.loading.read_grouped`) each entity's events are read once: an element code is
looked up in a small table of the codes already seen in that set (each slot stamped with the
set's number, so the table is never cleared), and a new code is counted, hashed (XXH64 of its
canonical text, :mod:`lshjob.core.hashing`) and folded into the signature (either scheme, the
one fold of :mod:`lshjob.sign._fold`; kernel in :mod:`lshjob.sign._grouped`). There is no per-set sort, no
compaction and no array of element hashes. Signatures and set sizes equal those of signing
the loaded ElementSets, byte for byte (tested).

Inputs with a count column or ``--min-count`` above 1 need per-element totals; they take the
ElementSets path.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from lshjob.ingest.loading import GroupedEvents, read_grouped
from lshjob.ingest.spec import EventSpec, IngestReport
from lshjob.sign.signatures import SignatureParams
from lshjob.sign.slices import sign_slices


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
    """:func:`sign_events` after reading: sign the grouped events (one slice of all;
    :func:`lshjob.sign.slices.sign_slices` gives them a slice at a time)."""
    table = next(sign_slices(grouped, params, max(len(grouped.keys), 1)))
    return table, grouped.report
