"""Data builders shared by the pipeline tests."""

from __future__ import annotations

import json
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import polars as pl


def planted_pairs(n_pairs: int, low: float, seed: int, background: int = 1000) -> pl.DataFrame:
    """Events (patron, title): n_pairs pairs of patrons with Jaccard spread over [low, 1)
    and titles private to each pair, plus background patrons drawing titles with long-tailed
    popularity (sets of 8 to 40, so background pairs rarely reach Jaccard 0.3)."""
    rng = np.random.default_rng(seed)
    rows_p, rows_t = [], []
    for i in range(n_pairs):
        x = int(rng.integers(1, 6))
        target = rng.uniform(low, 0.97)
        shared = max(1, int(round(2 * x * target / (1 - target))))
        base = [f"pair{i}-s{j}" for j in range(shared)]
        for side in ("a", "b"):
            titles = base + [f"pair{i}-{side}{j}" for j in range(x)]
            rows_p += [f"P{i:05d}{side}"] * len(titles)
            rows_t += titles
    for j in range(background):
        size = int(rng.integers(8, 40))
        titles = {f"T{int(t):05d}" for t in rng.zipf(1.15, size) % 20000}
        rows_p += [f"B{j:05d}"] * len(titles)
        rows_t += sorted(titles)
    return pl.DataFrame({"patron": rows_p, "title": rows_t})


def same_index(a: Path, b: Path) -> bool:
    """Two indexes hold the same rows, in the same order and types, and the same file
    metadata but for the run id (each run has its own)."""
    def meta(path):
        record = json.loads(pl.read_parquet_metadata(path / "neighbours.parquet")["lshjob"])
        return {k: v for k, v in record.items() if k != "run_id"}

    return (pl.read_parquet(a / "neighbours.parquet").equals(pl.read_parquet(b / "neighbours.parquet"))
            and meta(a) == meta(b))


INDEX_FILES = ("neighbours.parquet", "manifest.json")


def index_digest(folder) -> dict[str, str]:
    """sha256 of an index folder's two files (hashlib), to check an index is left byte for byte."""
    import hashlib
    from pathlib import Path

    return {name: hashlib.sha256((Path(folder) / name).read_bytes()).hexdigest() for name in INDEX_FILES}


def planted_events_file(tmp_path_factory):
    """40 planted pairs and 300 background patrons written once for a test module (Parquet)."""
    path = tmp_path_factory.mktemp("events") / "loans.parquet"
    planted_pairs(40, 0.5, seed=3, background=300).write_parquet(path)
    return path


def fmix64_np(x: np.ndarray) -> np.ndarray:
    """MurmurHash3 fmix64 on a uint64 array (wrapping arithmetic): keys scrambled like the
    package's (checked against MurmurHash3's fmix64 written out in tests/test_hashing.py)."""
    from lshjob.core.hashing import FMIX_C1, FMIX_C2

    x = x.astype(np.uint64, copy=True)
    for multiplier in (FMIX_C1, FMIX_C2):
        x ^= x >> np.uint64(33)
        x *= np.uint64(multiplier)
    x ^= x >> np.uint64(33)
    return x


def element_hashes(sets) -> np.ndarray:
    """The XXH64 every signature starts from, for each element of an ElementSets/ElementSets
    (``text_hashes[code]`` for text elements, the hash of the decimal text for integers)."""
    from lshjob.core.hashing import xxh64_integers

    if sets.text_hashes is not None:
        return sets.text_hashes[sets.elements]
    return xxh64_integers(sets.elements)
class SliceCounter:
    """A progress display (the ``progress`` of ``sign_file``) that counts the signature slices
    handed to the writer in the stage ``sign``: one advance a slice."""

    def __init__(self) -> None:
        self.slices = 0

    @contextmanager
    def stage(self, name: str, total: int = 1):
        counter = self

        class _Task:
            def advance(self, steps: int = 1) -> None:
                if name == "sign":
                    counter.slices += steps

        yield _Task()


def signature_matrix(h0: np.ndarray, offsets: np.ndarray, params) -> np.ndarray:
    """Signatures (n_sets x k, uint64) of sets given as element hashes in CSR form (every set
    non-empty), through the package's CSR kernel."""
    from lshjob.sign.signatures import sign_csr

    offsets = np.ascontiguousarray(offsets, dtype=np.int64)
    return sign_csr(offsets, h0, np.arange(len(offsets) - 1), params)


def sign_element_lists(sets: list[list], params) -> np.ndarray:
    """One signature row per list of element keys (small inputs in tests)."""
    from lshjob.core.hashing import xxh64_strings

    flat = [str(x) for s in sets for x in dict.fromkeys(s)]
    sizes = [len(dict.fromkeys(s)) for s in sets]
    assert all(n > 0 for n in sizes), "cannot sign an empty set"
    offsets = np.zeros(len(sets) + 1, dtype=np.int64)
    np.cumsum(sizes, out=offsets[1:])
    h0 = xxh64_strings(pl.Series(flat, dtype=pl.String))
    return signature_matrix(h0, offsets, params)


def neighbour_table(verified: pl.DataFrame, rep_of: np.ndarray, keys: pl.Series, top_k: int,
                    bands: int) -> pl.DataFrame:
    """The whole index as one table, through the package's publishing blocks (small runs)."""
    from lshjob.index.publish import expand, neighbour_blocks

    return pl.concat(list(neighbour_blocks(expand(verified, rep_of, top_k, bands), keys, 1 << 62)))
