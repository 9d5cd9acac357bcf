"""Crowds (:mod:`lshjob.index.join.base`) in the conformance checks: the candidate rows a
CROWDS file stands for (join), and a CROWDS file to verify (verify); oracles in itertools."""

from __future__ import annotations

from itertools import combinations
from pathlib import Path

import numpy as np
import polars as pl


def _expect(ok: bool, what: str, detail: str = "") -> None:
    if not ok:
        raise AssertionError(f"{what}{': ' + detail if detail else ''}")


def crowd_rows(crowds: Path | None) -> list[tuple[int, int, int]]:
    """The candidate rows a CROWDS file stands for: every pair of a crowd's members, bands_shared 1."""
    if crowds is None:
        return []
    table = pl.read_parquet(crowds)
    _expect(table.columns in (["crowd", "rep"], ["crowd", "rep", "band"]) and table.equals(table.sort("crowd", "rep"))
            and table.select(pl.struct("crowd", "rep").is_unique().all()).item(),
            "crowds: columns crowd, rep (and band); one row per (crowd, rep), sorted")
    if "band" in table.columns:
        _expect(table.group_by("crowd").agg(pl.col("band").n_unique())["band"].max() == 1
                and table.select(pl.struct("rep", "band").is_unique().all()).item(),
                "crowds: one band a crowd, a rep in one crowd a band at most")
    return [(a, b, 1) for _, members in table.group_by("crowd")
            for a, b in combinations(sorted(members["rep"].to_list()), 2)]


def crowds_of(entities: int, out: Path, seed: int = 6) -> tuple[Path, list[tuple[int, int, int]]]:
    """A CROWDS file of a few groups of entities (some overlapping, so a pair can be in two
    crowds) and the candidate rows it stands for: every pair of a crowd, bands_shared 1."""
    rng = np.random.default_rng(seed)
    groups = [np.sort(rng.choice(entities, size=int(rng.integers(3, 16)), replace=False)) for _ in range(8)]
    groups.append(np.array([1, 7, 200, 201]))  # identical sets 1, 7, 200
    groups.append(np.array([1, 7, 150]))  # pairs (1, 7) again
    crowds = pl.DataFrame({"crowd": np.repeat(np.arange(1, len(groups) + 1), [len(g) for g in groups]),
                           "rep": np.concatenate(groups)}, schema={"crowd": pl.Int64, "rep": pl.Int64})
    out.parent.mkdir(parents=True, exist_ok=True)
    crowds.write_parquet(out)
    return out, [(int(a), int(b), 1) for g in groups for a, b in combinations(g.tolist(), 2)]
