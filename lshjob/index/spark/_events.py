"""What a run on Spark runs inside the executors' Python workers before the join: elements
hashed (each distinct one once), sets signed and banded, on Arrow batches (``DataFrame.mapInArrow``).

As in :mod:`lshjob.index.spark._batches`, each function takes its settings first (bound with
:func:`functools.partial`) and an iterator of ``pyarrow.RecordBatch``; the values come from
the kernels the local engine runs: the XXH64 of an element's canonical text
(:func:`lshjob.core.hashing.element_hashes`), signing (:func:`lshjob.sign.signatures.sign_csr`
and :func:`lshjob.sign.signatures.comparable_by_position`) and the bucket keys
(:func:`lshjob.index.band.local.bucket_keys_by_position`). A set crosses Spark as the sorted
list of its elements' XXH64 (Int64 of the same bits, Spark having no unsigned type): the
hash every signature starts from, and, the run having checked that no two distinct elements
share one (:func:`lshjob.index.spark.events.check_distinct_hashes`), an exact element code.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from lshjob.index.spark._batches import _csr, _task_threads


def _nfc(column: pa.Array) -> pa.Array:
    """Text in Unicode NFC: only values holding a non-ASCII character are looked at (the
    local ingest's rule, :func:`lshjob.ingest.spec.nfc_replacement`)."""
    column = column.cast(pa.string())
    odd = pc.not_equal(pc.binary_length(column), pc.utf8_length(column))
    if not pc.any(odd).as_py():
        return column
    values = column.to_pylist()
    for i in np.flatnonzero(odd.to_numpy(zero_copy_only=False)):
        values[i] = unicodedata.normalize("NFC", values[i])
    return pa.array(values, pa.string())


def hashed_elements(nfc: bool, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Distinct elements (``element``) -> ``element`` as read, ``canonical`` (the same in NFC
    for text, ``nfc``) and ``hash``: the XXH64 of the canonical text as Int64 bits."""
    import polars as pl

    from lshjob.core.hashing import element_hashes

    for batch in batches:
        if batch.num_rows == 0:
            continue
        element = batch.column("element")
        canonical = _nfc(element) if nfc and pa.types.is_string(element.type) else element
        h0 = element_hashes(pl.Series(pl.from_arrow(canonical)))
        yield pa.RecordBatch.from_arrays(
            [element, canonical, pa.array(np.asarray(h0, dtype=np.uint64).view(np.int64))],
            names=["element", "canonical", "hash"])


def nfc_entities(batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Events whose text ``entity`` key is to be put in NFC, the other columns as they are."""
    for batch in batches:
        if batch.num_rows == 0:
            continue
        columns = [_nfc(batch.column(i)) if name == "entity" else batch.column(i)
                   for i, name in enumerate(batch.schema.names)]
        yield pa.RecordBatch.from_arrays(columns, names=batch.schema.names)


def _element_sets(batch: pa.RecordBatch):
    """A batch's sets (``hashes``: sorted lists) as :class:`lshjob.core.sets.ElementSets`
    whose codes index their own hashes (the dictionary form the local signing reads)."""
    import polars as pl

    from lshjob.core.sets import ElementSets

    offsets, hashes = _csr(batch.column("hashes"))
    codes = np.arange(len(hashes), dtype=np.int64)
    return ElementSets(pl.Series(np.arange(batch.num_rows)), offsets, codes, hashes.view(np.uint64))


def signed_sets(params, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Sets (``entity``, ``hashes``) -> SIGNATURES rows: ``entity``, ``signature`` (k values,
    UInt64 bits as Int64; the stored form, as ``lshjob sign`` writes it) and ``set_size``."""
    from lshjob.sign.signatures import sign_membership

    _task_threads()
    for batch in batches:
        n = batch.num_rows
        if n == 0:
            continue
        sets = _element_sets(batch)
        matrix = sign_membership(sets, np.arange(n, dtype=np.int64), params)
        flat = pa.array(np.ascontiguousarray(matrix).reshape(-1).view(np.int64))
        offsets = pa.array(np.arange(n + 1, dtype=np.int32) * params.perms)
        yield pa.RecordBatch.from_arrays(
            [batch.column("entity"), pa.ListArray.from_arrays(offsets, flat),
             pa.array(np.diff(sets.offsets).astype(np.int32))], names=["entity", "signature", "set_size"])


def band_rows(params, bands: int, rows: int, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Representatives' sets (``id``, ``hashes``) -> one bucket row a band (``band``,
    ``bucket`` as Int64 bits, ``rep``), by the local band engine's key definition over the
    first bands x rows positions of the comparable signatures."""
    from lshjob.index.band.local import bucket_keys_by_position
    from lshjob.sign.signatures import comparable_by_position

    _task_threads()
    schema = pa.schema([("band", pa.int32()), ("bucket", pa.int64()), ("rep", pa.int64())])
    for batch in batches:
        n = batch.num_rows
        if n == 0:
            continue
        columns = comparable_by_position(_element_sets(batch), np.arange(n, dtype=np.int64), params, bands * rows)
        ids = np.asarray(batch.column("id").to_numpy(), dtype=np.int64)
        keys = bucket_keys_by_position(columns, ids, bands, rows)
        matrix = np.column_stack([keys[str(j)].to_numpy() for j in range(bands)])  # n x bands, UInt64
        yield pa.RecordBatch.from_arrays(
            [pa.array(np.tile(np.arange(bands, dtype=np.int32), n)),
             pa.array(np.ascontiguousarray(matrix).reshape(-1).view(np.int64)),
             pa.array(np.repeat(ids, bands))], schema=schema)
