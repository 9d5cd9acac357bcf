"""The verified pairs' signature estimate (fraction of equal positions), made by signing
again only the sets that appear in a verified pair."""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.index.verify._agreement import signature_agreement
from lshjob.sign.signatures import SignatureParams, comparable, sign_membership


def add_estimates_between(verified: pl.DataFrame, left_sets: ElementSets, left_first: int,
                          right_sets: ElementSets, right_first: int, params: SignatureParams,
                          max_bytes: int | None = None) -> pl.DataFrame:
    """``estimate``, the signature estimate of each verified pair, by signing again only the sets
    that appear in a verified pair (no n x k matrix is kept for this); the two sides' sets given
    apart, as in :func:`lshjob.index.verify.local.verify_between`.
    With ``max_bytes``, the pairs are taken a slice at a time whose signatures (two rows a
    pair, raw and comparable, 8 bytes a position) take at most that many bytes."""
    left_all = verified["left_rep"].to_numpy() - left_first
    right_all = verified["right_rep"].to_numpy() - right_first
    step = len(left_all) if max_bytes is None else max(1024, max_bytes // (4 * 8 * params.perms))
    estimates = []
    for lo, hi in slice_bounds(len(left_all), step):
        left, right = left_all[lo:hi], right_all[lo:hi]
        if left_sets is right_sets and left_first == right_first:
            left_matrix, left_row = _signed(left_sets, np.concatenate([left, right]), params)
            right_matrix, right_row = left_matrix, left_row
        else:
            left_matrix, left_row = _signed(left_sets, left, params)
            right_matrix, right_row = _signed(right_sets, right, params)
        estimates.append(signature_agreement(left_matrix, left_row, np.ascontiguousarray(left),
                                             right_matrix, right_row, np.ascontiguousarray(right)))
        del left_matrix, right_matrix, left_row, right_row
    est = np.concatenate(estimates) if estimates else np.empty(0, dtype=np.float64)
    return verified.with_columns(pl.Series("estimate", est)).select(
        "left_rep", "right_rep", "jaccard", "estimate", "bands_shared")


def _signed(sets: ElementSets, wanted: np.ndarray, params: SignatureParams) -> tuple[np.ndarray, np.ndarray]:
    """Signatures of the distinct ``wanted`` sets, and the row of each set id in them."""
    ids = np.unique(wanted)
    matrix = comparable(sign_membership(sets, ids, params), params)
    row_of = np.full(sets.size, -1, dtype=np.int64)
    row_of[ids] = np.arange(len(ids))
    return matrix, row_of
