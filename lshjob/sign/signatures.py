"""Sign stage: membership rows -> MinHash signatures; merging; the signature file.

Two schemes, recorded in every signature file and never mixed. Scheme ``oph`` (one
permutation hashing with densification at comparison time) is in :mod:`lshjob.sign.oph`.

Scheme ``kperm`` (k-permutation MinHash; Broder, "On the resemblance and containment
of documents", 1997). Position i of a set's signature is

    sig[i] = min over elements x of fmix64(xxh64(x) XOR salt[i])

where xxh64 hashes the element key's canonical UTF-8 text with seed 0, salt is the
SplitMix64 sequence started at the user's seed and fmix64 is MurmurHash3's finaliser
(all in :mod:`lshjob.core.hashing`). Each fmix64(. XOR salt[i]) is a bijection of the
64-bit words, so distinct hashed elements never tie. The Jaccard estimate is the
fraction of equal positions (Broder 1997).

The signature table (a polars DataFrame; :mod:`lshjob.sign.slices` makes it from every
kind of input):

* the key columns (``entity``, and ``segment``/``period`` when present), unique, sorted;
* ``signature``: List(UInt64) of length k;
* ``set_size``: UInt32, number of distinct elements signed (exact unless the file
  metadata says ``set_size: estimated``, which :func:`merge_signatures` produces).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.contracts.signature_file import FORMAT_NAME, FORMAT_VERSION, HASH_FAMILY, METADATA_KEY, file_meta
from lshjob.core import slicing
from lshjob.core.atomic import atomic_file
from lshjob.core.hashing import splitmix64_sequence
from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.errors import IncompatibleSignatures, InputError
from lshjob.sign import _oph, oph
from lshjob.sign._kperm import sign_kperm
from lshjob.sign._merge import matrix_list, minimum_by_run
from lshjob.sign.params import SCHEMES, SignatureParams  # noqa: F401  (where callers have found them)

NO_ARRAY = np.empty(0, dtype=np.uint64)
NO_CODES = np.empty(0, dtype=np.int64)


def sign_csr(offsets: np.ndarray, h0: np.ndarray, ids: np.ndarray, params: SignatureParams) -> np.ndarray:
    """Signatures (len(ids) x k) of the sets ``ids`` of element hashes ``h0`` in CSR form."""
    h0 = np.ascontiguousarray(h0, dtype=np.uint64)
    return _sign(offsets, NO_CODES, h0, np.ascontiguousarray(ids, dtype=np.int64), params, False)


def _sign(offsets, codes, table, ids, params: SignatureParams, by_position: bool) -> np.ndarray:
    if params.scheme == "oph":  # the stored form (densified by position: comparable_by_position)
        return _oph.sign_oph(offsets, codes, table, ids, params.perms, oph_salts(params))
    return sign_kperm(offsets, codes, table, ids, params.salts(), by_position)


def oph_salts(params: SignatureParams) -> np.ndarray:
    """Salts of the oph scheme: bin, value and densification probes (SplitMix64 of the seed)."""
    return splitmix64_sequence(params.seed, 3)


def comparable(matrix: np.ndarray, params: SignatureParams) -> np.ndarray:
    """Signatures ready to compare or band: densified for ``oph``, unchanged for ``kperm``."""
    if params.scheme == "oph":
        return oph.densify(np.ascontiguousarray(matrix), oph_salts(params)[2], False)
    return matrix


def sign_membership(sets: ElementSets, ids: np.ndarray, params: SignatureParams) -> np.ndarray:
    """Signatures (len(ids) x k) of the sets ``ids`` of a :class:`~lshjob.core.sets.ElementSets`.
    Elements are hashed inside the signing loop: no copy of the sets, no array of hashes."""
    return _sign(*_membership_source(sets, ids), params, False)


def comparable_by_position(sets: ElementSets, ids: np.ndarray, params: SignatureParams,
                           positions: int | None = None) -> np.ndarray:
    """The first ``positions`` (default k) positions of the comparable signatures (densified
    for ``oph``) of the sets ``ids``, laid out by position: a (positions x len(ids)) matrix
    whose row i holds position i of every signature, so each row is a contiguous column for
    polars (the band stage reads positions, not rows, and only the first b x r of them)."""
    positions = params.perms if positions is None else positions
    if params.scheme == "oph":
        return _oph.sign_densified(*_membership_source(sets, ids), params.perms, oph_salts(params), positions)
    prefix = SignatureParams(scheme="kperm", perms=positions, seed=params.seed)  # salts: a prefix of one sequence
    return _sign(*_membership_source(sets, ids), prefix, True)


def comparable_positions(sets: ElementSets, ids: np.ndarray, params: SignatureParams, lo: int, hi: int) -> np.ndarray:
    """Positions lo..hi-1 of the comparable signatures of the sets ``ids`` (len(ids) x (hi - lo)):
    for ``kperm`` only those positions are computed (each has its own salt); ``oph`` signs and
    densifies all k, its positions depending on one another."""
    if params.scheme == "oph":
        return np.ascontiguousarray(comparable(sign_membership(sets, ids, params), params)[:, lo:hi])
    return sign_kperm(*_membership_source(sets, ids), np.ascontiguousarray(params.salts()[lo:hi]), False)


def _membership_source(sets: ElementSets, ids: np.ndarray) -> tuple:
    table = NO_ARRAY if sets.text_hashes is None else np.ascontiguousarray(sets.text_hashes, dtype=np.uint64)
    return sets.offsets, sets.elements, table, np.ascontiguousarray(ids, dtype=np.int64)


def run_lengths(table: pl.DataFrame, keys: list[str]) -> np.ndarray:
    """Lengths of the runs of equal keys in a table sorted by ``keys``."""
    key = pl.col(keys[0]) if len(keys) == 1 else pl.struct(keys)
    return table.select(key.rle().struct.field("len"))["len"].to_numpy().astype(np.int64)


def signature_column(matrix: np.ndarray) -> pl.Series:
    """A (n x k) uint64 matrix as the List(UInt64) column ``signature``."""
    k = matrix.shape[1]
    return pl.Series("signature", matrix, dtype=pl.Array(pl.UInt64, k)).cast(pl.List(pl.UInt64))


def signature_array(table: pl.DataFrame, k: int | None = None) -> np.ndarray:
    """The ``signature`` column as a contiguous (n x k) uint64 matrix. ``k`` (the file's,
    from its metadata) shapes a table without rows; without it such a table gives 0 x 0."""
    col = table.get_column("signature")
    if table.height == 0:
        return np.empty((0, k or 0), dtype=np.uint64)
    k = int(col.list.len().max()) if k is None else k
    return np.ascontiguousarray(col.list.to_array(k).to_numpy(), dtype=np.uint64)


def estimate_jaccard(a: np.ndarray, b: np.ndarray) -> np.ndarray | float:
    """Fraction of equal positions: an unbiased estimate of Jaccard (Broder 1997).

    For the ``oph`` scheme, pass signatures through :func:`comparable` first."""
    return np.mean(np.asarray(a) == np.asarray(b), axis=-1)


def estimate_set_size(matrix: np.ndarray) -> np.ndarray:
    """Distinct-count estimate from k minima scaled to (0, 1): (k - 1) / sum(u_i).

    With n elements each u_i ~ Beta(1, n), close to Exp(n); the sum of k of them is
    Gamma(k, n), for which (k - 1)/sum is unbiased for n (Cohen, "Size-estimation
    framework with applications to transitive closure and reachability", JCSS 1997;
    from memory).
    """
    k = matrix.shape[1]
    sums = np.empty(matrix.shape[0], dtype=np.float64)
    for a, b in slice_bounds(matrix.shape[0], slicing.SLICE_ROWS):  # blocks: no full-size float copies
        sums[a:b] = ((matrix[a:b].astype(np.float64) + 1.0) / 2.0**64).sum(axis=1)
    return np.maximum(1.0, (k - 1) / sums)


def merge_signatures(
    tables: list[tuple[pl.DataFrame, dict]], keep: list[str]
) -> tuple[pl.DataFrame, dict]:
    """Combine signature rows that share the ``keep`` key columns by element-wise minimum.

    ``keep=["entity"]`` folds all segments and periods of an entity into one set;
    several files (for example last month's and this month's) are folded the same way.
    Files must agree on scheme, k and seed. Tables without rows add nothing; when no table
    has a row the result has none, with the columns and types of one that has.
    """
    first_meta = tables[0][1]
    for _, meta in tables[1:]:
        check_compatible(first_meta, meta)
    for table, meta in tables:
        missing = [c for c in keep if c not in table.columns]
        if missing:
            raise InputError(
                f"{meta.get('path', 'signature table')}: column(s) {', '.join(missing)} not found; "
                f"columns are: {', '.join(table.columns)}"
            )
    # k from the metadata, not from a row: a table may have none
    k = int(first_meta["k"]) if "k" in first_meta else max(signature_array(t).shape[1] for t, _ in tables)
    # Sort the keys only (with each row's place), not the signatures: gathering them in key
    # order and taking the minimum is one compiled pass over each input matrix.
    keys = pl.concat([t.select(keep) for t, _ in tables], how="vertical_relaxed")
    order = keys.with_row_index("__row").sort(keep, maintain_order=True)
    lengths = run_lengths(order, keep) if order.height else np.zeros(0, dtype=np.int64)
    starts = np.zeros(len(lengths), dtype=np.int64)
    np.cumsum(lengths[:-1], out=starts[1:])
    matrices = matrix_list()
    for t, _ in tables:
        matrices.append(signature_array(t, k))
    firsts = np.cumsum([0] + [t.height for t, _ in tables]).astype(np.int64)
    matrix = minimum_by_run(matrices, firsts, order["__row"].to_numpy().astype(np.int64), starts, lengths, k)
    sizes = oph.set_size_estimate(matrix) if first_meta["scheme"] == "oph" else estimate_set_size(matrix)
    merged = order.select(keep).gather(starts).with_columns(
        signature_column(matrix),
        pl.Series("set_size", np.round(sizes), dtype=pl.UInt32),
    )
    return merged, merged_meta(first_meta, keep)


def merged_meta(first_meta: dict, keep: list[str]) -> dict:
    """The metadata of a merge's output: the inputs' scheme and hash family, the kept keys,
    set sizes estimated, and a period unit only while periods are kept."""
    meta = {k: v for k, v in first_meta.items() if k != "path"}
    meta.update(keys=list(keep), set_size="estimated")
    if "period" not in keep:
        meta["period_unit"] = None
    return meta


def check_compatible(a: dict, b: dict) -> None:
    for field_name in ("scheme", "hash", "k", "seed"):
        if a.get(field_name) != b.get(field_name):
            raise IncompatibleSignatures(
                f"cannot combine signatures with different {field_name}: "
                f"{a.get('path', 'first')} has {a.get(field_name)!r}, "
                f"{b.get('path', 'second')} has {b.get(field_name)!r}"
            )


def signature_metadata(params: SignatureParams, keys: list[str], **extra) -> dict:
    meta = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "scheme": params.scheme,
        "hash": HASH_FAMILY,
        "k": params.perms,
        "seed": params.seed,
        "keys": list(keys),
        "set_size": "exact",
    }
    meta.update(extra)
    return meta


def params_from_metadata(meta: dict) -> SignatureParams:
    return SignatureParams(scheme=meta["scheme"], perms=int(meta["k"]), seed=int(meta["seed"]))


def write_signatures(table: pl.DataFrame | pl.LazyFrame, path: str | Path, meta: dict) -> Path:
    """Write a signature file atomically (temporary name in the same folder, then rename); a
    lazy table is streamed into it (signatures made a key range at a time)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    metadata = {METADATA_KEY: json.dumps(meta, sort_keys=True)}
    with atomic_file(path) as tmp:
        # Row groups of 64k rows (about 70 MB at k=128): a read of one entity range (merge in
        # parts) decodes little more than the rows it keeps.
        if isinstance(table, pl.LazyFrame):
            table.sink_parquet(tmp, compression="snappy", metadata=metadata, maintain_order=True,
                               row_group_size=slicing.SLICE_ROWS)
        else:
            table.write_parquet(tmp, compression="snappy", metadata=metadata, row_group_size=slicing.SLICE_ROWS)
    return path


def read_signatures(path: str | Path) -> tuple[pl.DataFrame, dict]:
    """Read a signature file and its metadata; refuse files lshjob did not write."""
    meta = signature_meta(path)
    return pl.read_parquet(path), meta


def signature_meta(path: str | Path) -> dict:
    """The metadata of a signature file (its rows are not read); refuse files lshjob did
    not write."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such signature file")
    try:
        raw = pl.read_parquet_metadata(path)
    except Exception as exc:
        raise InputError(f"{path}: not a Parquet file ({exc})") from exc
    file_meta(raw, str(path))  # the format, its version and every entry (lshjob.contracts.signature_file)
    meta = json.loads(raw[METADATA_KEY])
    meta["path"] = str(path)
    return meta
