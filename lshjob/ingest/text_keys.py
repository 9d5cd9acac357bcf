"""Positions of text keys among the sorted distinct keys, by a hash table built once.

The one-pass reader (:mod:`lshjob.ingest.loading`) turns each batch of events into entity
ids (the position of the entity key among the sorted distinct keys) and, for text elements,
element codes (the position among the sorted distinct element texts). polars'
``search_sorted`` on text is a binary search of string comparisons, on one core: 1.5 s for
1.8M keys among 545k, most of the ingest of text-keyed data (long-tailed 300k entities, the
same events as integers and as text: ingest 0.4 s against 3.8 s; bench/RESULTS.md).

Here the distinct keys go once into an open-addressing table (linear probing, at most half
full) under polars' 64-bit hash of each; a batch is hashed (polars, all cores), each hash
looked up (compiled, all cores), and every position found checked by comparing the key held
there with the value. The hash only proposes: a value whose proposal fails the check (a key
whose hash shares the value's low 32 bits met first in the probe, or a value that is no key)
is searched again by ``search_sorted`` and checked again, so the positions are exact whatever
the hash gives. polars promises its hash
stable within one version only, which is all this needs: the table and the batches are
hashed in the same process, and nothing hashed here is kept.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import FIBONACCI

HASH_SEED = 0x6C73686A  # any fixed seed: the table and the batches take the same one


class TextPositions:
    """``positions(values)``: each value's position among ``keys`` (sorted, distinct, text,
    no nulls, fewer than 2**32 - 1), -1 for a value that is not a key. Holds 16 to 32 bytes a
    key (a table of 8-byte slots, at most half of them full)."""

    def __init__(self, keys: pl.Series) -> None:
        self.keys = keys.cast(pl.String)
        hashes = _hashes(self.keys)
        self.bits = max(4, int(2 * len(self.keys)).bit_length())
        # a slot: the low 32 bits of a key's hash over its position + 1 (0: empty), so a probe
        # reads one word a slot, not a slot and then the key's hash elsewhere
        self.table = np.zeros(1 << self.bits, dtype=np.uint64)
        _fill(self.table, hashes, self.bits)

    def __call__(self, values: pl.Series) -> np.ndarray:
        return self.positions(values)

    def positions(self, values: pl.Series) -> np.ndarray:
        values = values.cast(pl.String)
        if len(values) == 0 or len(self.keys) == 0:
            return np.full(len(values), -1, dtype=np.int64)
        found = _probe(self.table, self.bits, _hashes(values))
        wrong = ~_same(self.keys, found, values)
        if wrong.any():  # a value of no key, or another key proposed for it: searched
            at = np.flatnonzero(wrong)
            again = values.gather(at)
            searched = self.keys.search_sorted(again).to_numpy().astype(np.int64)
            found[at] = np.where(_same(self.keys, searched, again), searched, -1)
        return found


MAX_KEYS = 2**32 - 2  # positions + 1 in the 32 low bits of a slot


def text_positions(keys: pl.Series) -> TextPositions | None:
    """A :class:`TextPositions` for text keys, None for keys of another type (or too many)."""
    return TextPositions(keys) if keys.dtype == pl.String and len(keys) <= MAX_KEYS else None


def _hashes(values: pl.Series) -> np.ndarray:
    return np.ascontiguousarray(values.hash(HASH_SEED).to_numpy(), dtype=np.uint64)


def _same(keys: pl.Series, found: np.ndarray, values: pl.Series) -> np.ndarray:
    """Whether each position holds its value (a position out of range holds none)."""
    inside = (found >= 0) & (found < len(keys))
    held = keys.gather(np.where(inside, found, 0))
    return inside & (held == values).to_numpy()


LOW = np.uint64(0xFFFFFFFF)


@numba.njit(cache=True)
def _fill(table, hashes, bits):
    """Put each key (``table``: 2**bits slots, 0 for empty) in the first free slot from its
    hash's top bits on: its hash's low 32 bits over its position + 1."""
    mask = (1 << bits) - 1
    shift = np.uint64(64 - bits)
    for i in range(len(hashes)):
        s = np.int64((hashes[i] * FIBONACCI) >> shift)
        while table[s] != 0:
            s = (s + 1) & mask
        table[s] = ((hashes[i] & LOW) << np.uint64(32)) | np.uint64(i + 1)


@numba.njit(parallel=True, cache=True)
def _probe(table, bits, wanted):
    """The first key position whose slot holds each wanted hash's low 32 bits, -1 for none
    (a key with other high bits may be proposed: the caller checks every proposal)."""
    mask = (1 << bits) - 1
    shift = np.uint64(64 - bits)
    out = np.empty(len(wanted), dtype=np.int64)
    for j in numba.prange(len(wanted)):
        h = wanted[j]
        check = h & LOW
        s = np.int64((h * FIBONACCI) >> shift)
        found = -1
        while table[s] != 0:
            if table[s] >> np.uint64(32) == check:
                found = np.int64(table[s] & LOW) - 1
                break
            s = (s + 1) & mask
        out[j] = found
    return out
