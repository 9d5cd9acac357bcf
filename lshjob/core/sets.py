"""Entity sets in compressed sparse row form: the exact data signing, verification and
audits read.

Entity id i is the position of the entity key in ``keys``. Elements are stored as int64
*codes*, sorted within each entity: for integer element keys the code is the key itself;
for text keys it is the position of the key in the sorted list of distinct keys, and
``text_hashes[code]`` is the XXH64 of that text. Either way two elements are equal exactly
when their codes are, so intersections counted on codes are exact, and the hash every
signature starts from is ``text_hashes[code]``, or the XXH64 of an integer code's decimal
text (:mod:`lshjob.core.hashing`).
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import xxh64_of_integer, xxh64_strings

INT64_MAX = np.iinfo(np.int64).max


@dataclass
class ElementSets:
    """Each entity's set of elements in compressed rows (CSR): entity id i holds the sorted
    element codes ``elements[offsets[i]:offsets[i + 1]]``. What signing, verification and the
    audit read. (Not the polars table of (entity, element) rows of the ingest stage: that is
    SET_ROWS, :mod:`lshjob.contracts.tables`.)"""

    keys: pl.Series  # unique entity keys; entity id = position
    offsets: np.ndarray  # int64, length n + 1
    elements: np.ndarray  # int64 element codes, sorted within each entity
    text_hashes: np.ndarray | None = None  # XXH64 per code when elements are text keys

    @classmethod
    def from_sets(cls, sets: pl.DataFrame) -> ElementSets:
        """From membership rows with columns ``entity`` and ``element`` (ingest contract);
        entities in sorted key order."""
        codes, text_hashes = element_codes(sets.get_column("element"))
        frame = sets.select("entity").with_columns(code=codes).sort("entity", "code")
        return cls.from_sorted(frame, text_hashes)

    @classmethod
    def from_sorted(cls, frame: pl.DataFrame, text_hashes: np.ndarray | None) -> ElementSets:
        """From rows (entity, code) sorted by entity, then code."""
        runs = frame.select(pl.col("entity").rle()).unnest("entity")
        sizes = runs["len"].to_numpy().astype(np.int64)
        offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
        np.cumsum(sizes, out=offsets[1:])
        elements = np.ascontiguousarray(frame["code"].to_numpy(), dtype=np.int64)
        return cls(runs["value"].alias("entity"), offsets, elements, text_hashes)

    @property
    def size(self) -> int:
        return len(self.offsets) - 1

    @property
    def set_sizes(self) -> np.ndarray:
        return np.diff(self.offsets)

    def subset(self, ids: np.ndarray) -> ElementSets:
        """The sets of the given entity ids (kept in the given order)."""
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        offsets, elements = gather_sets(self.offsets, self.elements, ids)
        return ElementSets(self.keys.gather(ids), offsets, elements, self.text_hashes)


def element_codes(values: pl.Series) -> tuple[pl.Series, np.ndarray | None]:
    """(codes, text_hashes): see the module docstring. Integer keys that do not fit int64
    (UInt64 above 2**63 - 1) are coded as text, which hashes alike."""
    if values.dtype.is_integer() and (values.dtype != pl.UInt64 or len(values) == 0
                                      or values.max() <= INT64_MAX):
        return values.cast(pl.Int64).alias("code"), None
    text = values.cast(pl.String)
    dictionary = text.unique().sort()
    codes = text.rank("dense").cast(pl.Int64) - 1  # position in the sorted distinct keys
    return codes.alias("code"), xxh64_strings(dictionary)


def nfc_codes(dictionary: pl.Series) -> tuple[pl.Series, np.ndarray | None]:
    """(sorted distinct NFC forms, code of each dictionary entry among them); (dictionary,
    None) when every entry is NFC already. Only entries holding a non-ASCII character are
    normalised (Python's unicodedata, on distinct values only)."""
    odd = np.flatnonzero((dictionary.str.len_bytes() != dictionary.str.len_chars()).to_numpy())
    texts = dictionary.gather(odd).to_list()
    forms = [unicodedata.normalize("NFC", t) for t in texts]
    if forms == texts:
        return dictionary, None
    normal = dictionary.clone().scatter(odd, forms)  # (scatter writes in place: the dictionary stays as read)
    canonical = normal.unique().sort()
    return canonical, canonical.search_sorted(normal).to_numpy().astype(np.int64)


@numba.njit(inline="always")
def element_hash(j, codes, table):
    """The XXH64 every signature starts from, of element j of a CSR element array, inside
    compiled loops. Three forms: ``codes`` empty, ``table`` holds the hashes in place
    (``table[j]``); ``table`` empty, ``codes`` are integer elements, hashed from their
    decimal text here; both given, ``codes`` index the
    dictionary hashes (``table[codes[j]]``)."""
    if codes.shape[0] == 0:
        return table[j]
    if table.shape[0] == 0:
        return xxh64_of_integer(codes[j], np.uint64(0))
    return table[codes[j]]


@numba.njit(inline="always")
def store_row(out, t, row, by_position):
    """Write signature row ``row`` as signature t of ``out``: column t of a (k x n) matrix
    laid out by position, or row t of an (n x k) one."""
    if by_position:
        for i in range(row.shape[0]):
            out[i, t] = row[i]
    else:  # element by element: ``out[t] = row`` compiles numba's shape-mismatch error (seconds)
        for i in range(row.shape[0]):
            out[t, i] = row[i]


@numba.njit(parallel=True, cache=True)
def gather_sets(offsets, elements, ids):
    """CSR of the sets ``ids`` (in that order); the copy runs on all cores."""
    out_offsets = np.zeros(len(ids) + 1, dtype=np.int64)
    for t in range(len(ids)):
        out_offsets[t + 1] = out_offsets[t] + offsets[ids[t] + 1] - offsets[ids[t]]
    out = np.empty(out_offsets[-1], dtype=np.int64)
    for t in numba.prange(len(ids)):
        a = offsets[ids[t]]
        out[out_offsets[t]:out_offsets[t + 1]] = elements[a:a + out_offsets[t + 1] - out_offsets[t]]
    return out_offsets, out
