"""The verified pairs' signature estimate (fraction of equal positions), made by signing
again only the sets that appear in a verified pair."""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.index.verify._agreement import add_equal_positions
from lshjob.sign.signatures import SignatureParams, comparable_positions


def add_estimates_between(verified: pl.DataFrame, left_sets: ElementSets, left_first: int,
                          right_sets: ElementSets, right_first: int, params: SignatureParams,
                          max_bytes: int | None = None) -> pl.DataFrame:
    """``estimate``, the signature estimate of each verified pair, by signing again only the sets
    that appear in a verified pair (no n x k matrix is kept for this); the two sides' sets given
    apart, as in :func:`lshjob.index.verify.local.verify_between`.

    With ``max_bytes``, what is held at a time (8 bytes a position and set; 16 for ``oph``, raw
    and densified) stays under it. ``kperm`` signs a chunk of positions at a time, each computed
    alone, as wide as lets every set in a pair be held at once: each set is signed once in all,
    whatever the pairs. ``oph`` (its positions made together), or ``kperm`` when even one
    position of every set does not fit, takes the sets a block at a time (consecutive ids among
    those in a pair), each block once per block of the other side it meets, the pairs a pair of
    blocks at a time. Equal positions are counted as integers and divided by k once: the same
    value as one pass over all positions (10M long-tailed entities: blocks of 190k sets signed
    every set about 19 times, 104 of the run's 706 s)."""
    left_all = verified["left_rep"].to_numpy() - left_first
    right_all = verified["right_rep"].to_numpy() - right_first
    same = left_sets is right_sets and left_first == right_first
    equal = np.zeros(len(left_all), dtype=np.int64)
    if len(left_all):
        left_ids = _distinct(left_sets.size, left_all, right_all if same else None)
        right_ids = left_ids if same else _distinct(right_sets.size, right_all)
        width, block = _chunks(params, len(left_ids) + (0 if same else len(right_ids)), max_bytes)
        left_blocks, left_of = _blocks(left_ids, left_all, block)
        right_blocks, right_of = _blocks(right_ids, right_all, block)
        # pairs grouped by their two blocks (a stable radix sort when the key fits 16 bits)
        key = left_of.astype(np.int64) * len(right_blocks) + right_of
        order = np.argsort(key.astype(np.uint16) if key.max() < 2**16 else key, kind="stable")
        bounds = np.searchsorted(key[order], np.arange(len(left_blocks) * len(right_blocks) + 1))
        for lo in range(0, params.perms, width):
            hi = min(params.perms, lo + width)
            for i, left_block in enumerate(left_blocks):
                todo = [j for j in range(len(right_blocks))
                        if bounds[i * len(right_blocks) + j + 1] > bounds[i * len(right_blocks) + j]]
                if not todo:
                    continue
                left_matrix, left_row = _signed(left_sets, left_block, params, lo, hi)
                for j in todo:
                    if same and j == i:
                        right_matrix, right_row = left_matrix, left_row
                    else:
                        right_matrix, right_row = _signed(right_sets, right_blocks[j], params, lo, hi)
                    at = order[bounds[i * len(right_blocks) + j]:bounds[i * len(right_blocks) + j + 1]]
                    add_equal_positions(equal, left_matrix, left_row, np.ascontiguousarray(left_all[at]),
                                        right_matrix, right_row, np.ascontiguousarray(right_all[at]), at)
                    del right_matrix, right_row
                del left_matrix, left_row
    return verified.with_columns(pl.Series("estimate", equal / params.perms)).select(
        "left_rep", "right_rep", "jaccard", "estimate", "bands_shared")


def _chunks(params: SignatureParams, held: int, max_bytes: int | None) -> tuple[int, int | None]:
    """(positions signed at a time, sets a block or None for all) for ``held`` sets in pairs
    (:func:`add_estimates_between`)."""
    if max_bytes is None:
        return params.perms, None
    if params.scheme == "kperm" and 8 * held <= max_bytes:
        return int(min(params.perms, max_bytes // (8 * held))), None
    width = params.perms if params.scheme == "oph" else 1
    return width, max(1024, max_bytes // (2 * (2 if params.scheme == "oph" else 1) * 8 * width))


def _distinct(size: int, ids: np.ndarray, more: np.ndarray | None = None) -> np.ndarray:
    """The distinct values of ``ids`` (and ``more``), all in 0..size-1, ascending."""
    seen = np.zeros(size, dtype=bool)
    seen[ids] = True
    if more is not None:
        seen[more] = True
    return np.flatnonzero(seen)


def _blocks(ids: np.ndarray, wanted: np.ndarray, size: int | None) -> tuple[list[np.ndarray], np.ndarray]:
    """``ids`` (sorted, distinct) cut into blocks of at most ``size`` (None: one block), and
    the block of each of ``wanted`` (all among ``ids``)."""
    if size is None or len(ids) <= size:
        return [ids], np.zeros(len(wanted), dtype=np.int64)
    firsts = ids[::size]
    return [ids[lo:lo + size] for lo in range(0, len(ids), size)], np.searchsorted(firsts, wanted, side="right") - 1


def _signed(sets: ElementSets, ids: np.ndarray, params: SignatureParams, lo: int,
            hi: int) -> tuple[np.ndarray, np.ndarray]:
    """Positions lo..hi-1 of the signatures of the distinct sets ``ids`` (sorted), and the row
    of each set id in them."""
    matrix = comparable_positions(sets, ids, params, lo, hi)
    row_of = np.full(sets.size, -1, dtype=np.int64)
    row_of[ids] = np.arange(len(ids))
    return matrix, row_of
