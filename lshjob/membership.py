"""Entity sets in compressed sparse row form: the exact data verification and audits read.

Entity id i is the position of the entity key in sorted order (the order signature tables
use); elements are dense ids 0..n_elements-1, sorted within each entity.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl


@dataclass
class Membership:
    keys: pl.Series  # sorted, unique entity keys; entity id = position
    offsets: np.ndarray  # int64, length n + 1
    elements: np.ndarray  # int64 dense element ids, sorted within each entity
    n_elements: int

    @classmethod
    def from_sets(cls, sets: pl.DataFrame) -> "Membership":
        """From membership rows with columns ``entity`` and ``element`` (ingest contract)."""
        frame = sets.select(
            "entity", (pl.col("element").rank("dense").cast(pl.Int64) - 1).alias("eid")
        ).sort("entity", "eid")
        runs = frame.select(pl.col("entity").rle()).unnest("entity")
        sizes = runs["len"].to_numpy().astype(np.int64)
        offsets = np.zeros(len(sizes) + 1, dtype=np.int64)
        np.cumsum(sizes, out=offsets[1:])
        elements = np.ascontiguousarray(frame["eid"].to_numpy())
        n_elements = int(elements.max()) + 1 if len(elements) else 0
        return cls(runs["value"].alias("entity"), offsets, elements, n_elements)

    @property
    def size(self) -> int:
        return len(self.offsets) - 1

    @property
    def set_sizes(self) -> np.ndarray:
        return np.diff(self.offsets)

    def subset(self, ids: np.ndarray) -> "Membership":
        """The sets of the given entity ids (kept in the given order)."""
        ids = np.asarray(ids, dtype=np.int64)
        sizes = self.set_sizes[ids]
        offsets = np.zeros(len(ids) + 1, dtype=np.int64)
        np.cumsum(sizes, out=offsets[1:])
        if len(ids):
            idx = np.concatenate([np.arange(self.offsets[i], self.offsets[i + 1]) for i in ids])
        else:
            idx = np.empty(0, dtype=np.int64)
        return Membership(self.keys.gather(ids), offsets, self.elements[idx], self.n_elements)
