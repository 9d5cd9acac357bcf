"""What the Spark engines run inside the executors' Python workers, on Arrow batches.

Each function takes an iterator of ``pyarrow.RecordBatch`` and yields batches
(``DataFrame.mapInArrow``); its settings come first, bound with :func:`functools.partial`,
so Spark pickles a reference to this module, not code. The values come from the project's
own kernels (Jaccard, signing, signature agreement); Spark has no unsigned 64-bit type, so
UInt64 bucket keys travel through Spark as the Int64 of the same 64 bits (a bijection:
equal keys stay equal) and are written back as UInt64.
"""

from __future__ import annotations

import os
from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

BUCKET_ROW_SCHEMA = pa.schema([("band", pa.int32()), ("bucket", pa.int64()), ("rep", pa.int64())])
BUCKET_FILE_SCHEMA = pa.schema([("band", pa.int32()), ("bucket", pa.uint64()), ("rep", pa.int64())])
READ_ROWS = 1 << 16  # rows a reading task holds at a time
GROUP_ROWS = 1 << 20  # rows of a row group written (a later reading task's share)


def _signed(column: pa.Array) -> np.ndarray:
    """The 64 bits of a UInt64 (or Int64) column as Int64."""
    return np.asarray(column.to_numpy(zero_copy_only=False)).view(np.int64)


def _pieces(batches: Iterator[pa.RecordBatch]) -> Iterator[tuple[str, int]]:
    for batch in batches:
        yield from zip(batch.column("path").to_pylist(), batch.column("row_group").to_pylist())


def bucket_rows_of_files(batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Row groups of BUCKET_ROWS files (bucket UInt64) -> their rows, bucket as Int64 bits."""
    for path, group in _pieces(batches):
        for batch in pq.ParquetFile(path).iter_batches(READ_ROWS, [group], ["band", "bucket", "rep"]):
            yield pa.RecordBatch.from_arrays(
                [batch.column("band").cast(pa.int32()), pa.array(_signed(batch.column("bucket"))),
                 batch.column("rep").cast(pa.int64())], schema=BUCKET_ROW_SCHEMA)


def write_bucket_file(folder: str, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Write a task's bucket rows as one BUCKET_ROWS file (bucket UInt64 again), under a
    temporary name renamed when whole; yield its path and row count (nothing when empty).
    A task run again writes the same name with the same rows."""
    from pyspark import TaskContext

    context = TaskContext.get()
    name = f"buckets-s{context.partitionId():05d}.parquet"
    tmp = os.path.join(folder, f".{name}.{context.attemptNumber()}.tmp")
    writer, rows, held = None, 0, []

    def flush() -> None:
        nonlocal writer
        if writer is None:
            writer = pq.ParquetWriter(tmp, BUCKET_FILE_SCHEMA, compression="lz4", write_statistics=False)
        writer.write_table(pa.Table.from_batches(held, BUCKET_FILE_SCHEMA))  # one row group
        held.clear()

    try:
        for batch in batches:
            if batch.num_rows == 0:
                continue
            bucket = pa.array(_signed(batch.column("bucket")).view(np.uint64))
            held.append(pa.RecordBatch.from_arrays([batch.column("band"), bucket, batch.column("rep")],
                                                   schema=BUCKET_FILE_SCHEMA))
            rows += batch.num_rows
            if sum(b.num_rows for b in held) >= GROUP_ROWS:
                flush()
        if held:
            flush()
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        return
    path = os.path.join(folder, name)
    os.replace(tmp, path)
    yield pa.RecordBatch.from_pydict({"path": [path], "rows": [rows]})


def _csr(lists: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(offsets from 0, values) of a list column of a batch (a slice keeps its parent's offsets)."""
    offsets = np.asarray(lists.offsets.to_numpy(), dtype=np.int64)
    values = lists.values.to_numpy(zero_copy_only=False)[offsets[0]:offsets[-1]]
    return offsets - offsets[0], np.ascontiguousarray(values, dtype=np.int64)


def _task_threads() -> None:
    """The kernels' threads: the cores Spark gave the task (``spark.task.cpus``), not the machine's."""
    import numba
    from pyspark import TaskContext

    context = TaskContext.get()
    cpus = int(context.cpus()) if context is not None else 1
    numba.set_num_threads(max(1, min(cpus, numba.config.NUMBA_NUM_THREADS)))


def verify_pairs(threshold: float, params, batches: Iterator[pa.RecordBatch]) -> Iterator[pa.RecordBatch]:
    """Candidates with both sides' sets (``left_elements``, ``right_elements``: sorted element
    codes; ``left_hashes``, ``right_hashes``: their XXH64 as Int64 bits, when ``params``) ->
    VERIFIED rows: exact Jaccard by the verify kernel, kept where it reaches ``threshold``,
    and the fraction of equal positions of the signatures the signing kernels make of the
    kept pairs' sets (the exact value when ``params`` is None)."""
    from lshjob.index.verify._agreement import signature_agreement
    from lshjob.index.verify._jaccard import jaccard_between
    from lshjob.sign.signatures import comparable, sign_csr

    _task_threads()
    schema = pa.schema([("left_rep", pa.int64()), ("right_rep", pa.int64()), ("jaccard", pa.float64()),
                        ("estimate", pa.float64()), ("bands_shared", pa.int32())])
    for batch in batches:
        n = batch.num_rows
        if n == 0:
            continue
        lo, le = _csr(batch.column("left_elements"))
        ro, re = _csr(batch.column("right_elements"))
        every = np.arange(n, dtype=np.int64)
        jac = jaccard_between(lo, le, every, ro, re, every, threshold)
        kept = np.flatnonzero(jac >= threshold).astype(np.int64)
        if len(kept) == 0:
            continue
        if params is None:
            estimate = jac[kept]
        else:
            _, left_hashes = _csr(batch.column("left_hashes"))
            _, right_hashes = _csr(batch.column("right_hashes"))
            left = comparable(sign_csr(lo, left_hashes.view(np.uint64), kept, params), params)
            right = comparable(sign_csr(ro, right_hashes.view(np.uint64), kept, params), params)
            rows = np.arange(len(kept), dtype=np.int64)
            estimate = signature_agreement(left, rows, rows, right, rows, rows)
        columns = [batch.column("left_rep").to_numpy()[kept], batch.column("right_rep").to_numpy()[kept],
                   jac[kept], estimate, batch.column("bands_shared").to_numpy()[kept].astype(np.int32)]
        yield pa.RecordBatch.from_arrays([pa.array(c) for c in columns], schema=schema)
