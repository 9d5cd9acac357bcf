"""Buckets the join left over its cap, held in reserve (RESERVE, :mod:`lshjob.index.join.base`):
which to compare whole, and their pairs, within one part.

A bucket over the cap is split by the next band, and what is still over is skipped: on most
long-tailed data its members' lists are full from other buckets, and comparing it would
cost more than it finds (1M long-tailed entities: a quarter more time for 0.4 points of
recall; bench/RESULTS.md, "Buckets held in reserve"). Where tiny sets hold one popular element
(a bestseller and one other title), the bucket they share is over the cap in every band and
is the only place their pairs meet: skipping it loses their lists whole.

So once the join's pairs and crowds are verified, each reserve bucket is judged by a sample
of its members (``SAMPLED`` a bucket, those whose entity id hashes lowest: the same draw in
every run). A drawn member's gain is the share of its top-k list (rows, each partner counting
its identical group, at most ``top_k + 1``) that would come from this bucket: its new rows
(partners over the threshold, above the member's floor when its list is full,
:func:`lshjob.index._ranking.list_cuts`, not already held), at most k, over those plus the
rows held (its own group's and its partners'), at most k. A member whose only partners are in
the bucket gains 1, whatever k; one whose list is full gains the share its new partners would
take. A bucket's work is the pairs comparing it whole would try: each drawn member's
partners in its size range at the threshold that the elements every member holds may bring
to the threshold alone, or that share another element (by the element masks), times the
members over two (the crowd kernel's cost is these proposals, some 10-25 ns each on two
cores; bench/RESULTS.md, "A second tier of reserve buckets").

Buckets are compared whole, as crowds with the floors
(:func:`lshjob.index.verify._crowds.crowd_pieces`), in two tiers: those whose members' lists
hang on them (mean gain ``RESCUE_GAIN`` or more) by gain, within ``RESCUE_WORK``; then those
that would add a little to many lists (mean gain ``RESCUE_SOME`` or more), the most rows for
their work first, within a smaller ``SPARE_WORK``. Pairs already held are not added again
(their ``bands_shared`` counts the buckets within the cap).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core._jit import numba
from lshjob.core.hashing import fmix64_expr
from lshjob.index.verify._crowds import crowd_pairs_between, crowd_pieces
from lshjob.index.verify._jaccard import _bits, _intersection, element_masks

SAMPLED = 64  # members drawn from each reserve bucket
RESCUE_GAIN = 0.25  # mean share of a drawn member's list that makes a bucket one lists hang on
# the pairs those buckets may try, about: 2e8 or 200 a set, whichever is more (a few seconds)
RESCUE_WORK, RESCUE_WORK_PER_SET = 2e8, 200
RESCUE_SOME = 0.05  # mean share that makes a bucket worth its work when cheap
SPARE_WORK, SPARE_WORK_PER_SET = 2e7, 20  # the pairs those may try, about (half a second)


@numba.njit(parallel=True, cache=True)
def _gains(offsets, elements, masks, members, sizes, start, count, shared, drawn, drawn_bucket, drawn_rows, floors,
           weights, threshold, top_k, held_keys, n):
    """Each drawn member's gain (module docstring): ``drawn[d]`` of bucket ``drawn_bucket[d]``,
    whose members are ``members[start[c]:start[c] + count[c]]`` sorted by set size
    (``sizes``, the same order). Partners are sought above max(threshold, the member's floor):
    only sizes that allow it (a range of the sorted members), then the masks' bound
    (:func:`lshjob.index.verify._jaccard.screened_rows`), then a merge. ``held_keys``:
    sorted ``a * n + b`` of the pairs held, both orders; ``weights``: each id's rows in a
    list; ``drawn_rows``: the rows each drawn member's list holds already; ``top_k`` 0: lists
    without a cap. With the gains, the partners each drawn member would be tried against when
    the bucket is compared whole (:func:`lshjob.index.verify._crowds._crowd_pairs_within`, at
    the threshold: a pair is sought at the lower of its sides' floors): in its size range,
    those the elements all members share (``shared[c]``: the AND of their masks, at least
    those elements' bits) may bring to the threshold alone, and those whose mask meets its
    other elements'. The bucket's work is about its members times their mean, halved."""
    out = np.zeros(len(drawn))
    proposed = np.zeros(len(drawn))
    for d in numba.prange(len(drawn)):
        a, c = drawn[d], drawn_bucket[d]
        la = offsets[a + 1] - offsets[a]
        floor = floors[a]
        bar = max(threshold, floor)
        lo, hi = start[c], start[c] + count[c]
        first = lo + np.searchsorted(sizes[lo:hi], np.ceil(threshold * la - 1e-9))
        last = lo + np.searchsorted(sizes[lo:hi], np.floor(la / threshold + 1e-9), side="right")
        rows, enough = 0, top_k if top_k > 0 else 1 << 62
        common, own = np.int64(_bits(shared[c])), masks[a] & ~shared[c]
        for t in range(first, last):
            b = members[t]
            if b == a:
                continue
            lb = sizes[t]
            ma, mb = masks[a], masks[b]
            # what the crowd kernel tries: partners the shared elements alone may bring to the
            # threshold, and those sharing one of the rest (its postings)
            if int(np.ceil(threshold / (1.0 + threshold) * (la + lb) - 1e-9)) <= common or own & mb:
                proposed[d] += 1
            # (a floor of 1.0: its own group fills its list)
            if floor >= 1.0 or lb < np.ceil(bar * la - 1e-9) or lb > np.floor(la / bar + 1e-9):
                continue
            need = int(np.ceil(bar / (1.0 + bar) * (la + lb) - 1e-9))
            if min(la - np.int64(_bits(ma & ~mb)), lb - np.int64(_bits(mb & ~ma))) < need:
                continue
            inter = _intersection(elements, offsets[a], offsets[a + 1], elements, offsets[b], offsets[b + 1], need)
            jac = inter / (la + lb - inter)
            if inter < need or jac < threshold or jac <= floor:
                continue
            key = a * n + b
            at = np.searchsorted(held_keys, key)
            if at < len(held_keys) and held_keys[at] == key:
                continue
            rows += weights[b]
        if rows > 0:
            out[d] = min(rows, enough) / min(rows + drawn_rows[d], enough)
    return out, proposed


def held_keys(pairs: pl.DataFrame | None, n: int, ids: pl.Series | None = None) -> np.ndarray:
    """Sorted ``a * n + b`` of ``pairs`` (``left_rep``, ``right_rep``) in both orders; only the
    pairs with a side in ``ids`` when given."""
    if pairs is None or pairs.height == 0:
        return np.empty(0, dtype=np.int64)
    if ids is not None:
        ids = ids.implode()
        pairs = pairs.filter(pl.col("left_rep").is_in(ids) | pl.col("right_rep").is_in(ids))
    left, right = pairs["left_rep"].to_numpy(), pairs["right_rep"].to_numpy()
    return np.sort(np.concatenate([left * n + right, right * n + left]))


def drawn_members(reserve: pl.DataFrame, per_bucket: int = SAMPLED) -> pl.DataFrame:
    """The members drawn from each bucket of ``reserve`` (``crowd``, ``rep``): the
    ``per_bucket`` whose id hashes lowest (MurmurHash3's fmix64, a stable hash), sorted by
    crowd then rep."""
    hashed = reserve.select("crowd", "rep", h=fmix64_expr(pl.col("rep").cast(pl.UInt64)))
    return (hashed.filter(pl.col("h").rank("ordinal").over("crowd") <= per_bucket)
            .select("crowd", "rep").sort("crowd", "rep"))


def bucket_gains(reserve: pl.DataFrame, sets, masks: np.ndarray, threshold: float, floors: np.ndarray,
                 weights: np.ndarray, top_k: int, held: pl.DataFrame | None, group_sizes=None) -> pl.DataFrame:
    """Each reserve bucket (``crowd``, ``members``) with its drawn members' mean gain and the
    pairs comparing it whole would try, about (``work``; module docstring).
    ``held``: the pairs held so far (``left_rep``, ``right_rep``); ``group_sizes``: by entity id,
    the identical sets each stands for (one each when None)."""
    set_sizes = np.diff(sets.offsets)
    by_size = reserve.select("crowd", "rep").with_columns(size=pl.Series(set_sizes[reserve["rep"].to_numpy()]))
    by_size = by_size.sort("crowd", "size", "rep")
    buckets = by_size.group_by("crowd", maintain_order=True).agg(members=pl.len())
    counts = buckets["members"].to_numpy().astype(np.int64)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    drawn = drawn_members(reserve)
    bucket_of = np.searchsorted(buckets["crowd"].to_numpy(), drawn["crowd"].to_numpy())
    n = len(sets.offsets) - 1
    keys = held_keys(held, n, drawn["rep"])  # a * n + b, both orders: a side drawn
    ids = drawn["rep"].to_numpy()
    distinct = np.unique(ids)
    first = np.isin(keys // n, distinct)  # side a drawn: b is its partner
    partner_rows = np.bincount(np.searchsorted(distinct, keys[first] // n), weights=weights[keys[first] % n],
                               minlength=len(distinct))
    own_rows = np.asarray(group_sizes)[distinct] - 1 if group_sizes is not None else 0
    drawn_rows = (partner_rows + own_rows)[np.searchsorted(distinct, ids)].astype(np.int64)
    members = np.ascontiguousarray(by_size["rep"].to_numpy(), dtype=np.int64)
    shared = np.bitwise_and.reduceat(masks[members], starts) if len(members) else masks[:0]
    gain, proposed = _gains(sets.offsets, sets.elements, masks, members,
                  np.ascontiguousarray(by_size["size"].to_numpy(), dtype=np.int64), starts, counts, shared,
                  np.ascontiguousarray(ids, dtype=np.int64), bucket_of.astype(np.int64), drawn_rows,
                  np.ascontiguousarray(floors, dtype=np.float64), np.ascontiguousarray(weights, dtype=np.int64),
                  threshold, top_k, keys, n)
    drawn_per = np.maximum(np.bincount(bucket_of, minlength=len(counts)), 1)
    mean = np.bincount(bucket_of, weights=gain, minlength=len(counts)) / drawn_per
    work = counts * np.bincount(bucket_of, weights=proposed, minlength=len(counts)) / drawn_per / 2
    return buckets.with_columns(gain=pl.Series(mean), work=pl.Series(work))


def worth_comparing(gains: pl.DataFrame, budget: float, spare: float = 0.0) -> pl.Series:
    """The buckets (``crowd``) of ``gains`` (:func:`bucket_gains`) to compare, in two tiers
    (module docstring): those whose members gain ``RESCUE_GAIN`` on average, the highest gains
    first, while their work adds up to at most ``budget``; then those gaining ``RESCUE_SOME``,
    the most list rows a unit of work first (members x gain / work), within ``spare``. A
    bucket that would pass its tier's budget is left, and the next tried."""
    chosen: list = []
    ranked = gains.with_columns(density=pl.col("members") * pl.col("gain") / pl.max_horizontal("work", 1.0))
    for tier, key, allowed in ((pl.col("gain") >= RESCUE_GAIN, "gain", budget),
                               (pl.col("gain").is_between(RESCUE_SOME, RESCUE_GAIN, closed="left"), "density", spare)):
        spent = 0.0
        for crowd, work in ranked.filter(tier).sort(key, "crowd", descending=[True, False]).select(
                "crowd", "work").iter_rows():
            if spent + work <= allowed:
                chosen.append(crowd)
                spent += work
    return pl.Series("crowd", chosen, dtype=gains["crowd"].dtype)


def reserve_pieces(reserve_file: Path, held, sets, threshold: float, settings, masks=None) -> Iterator[pl.DataFrame]:
    """The rows of the reserve buckets worth comparing (module docstring) for one part's
    ``held`` rows (:class:`lshjob.index.verify.local.HeldRows`, settled here), none already
    held; ``settings.tally["reserve"]``: the buckets held, compared, and the pairs compared."""
    reserve = pl.read_parquet(reserve_file)
    held.settle()
    n = len(sets.offsets) - 1
    floors = held.floors_now() if held.floors is not None else np.full(n, -1.0)
    top_k = settings.top_k or 0
    sizes = settings.group_sizes if settings.group_sizes is not None else np.ones(n, dtype=np.int64)
    weights = np.minimum(top_k + 1, sizes) if top_k else np.ones(n, dtype=np.int64)
    if masks is None:
        masks = (element_masks(sets.offsets, sets.elements),) * 2
    gains = bucket_gains(reserve, sets, masks[0], threshold, floors, weights, top_k, held.kept, settings.group_sizes)
    chosen = worth_comparing(gains, max(RESCUE_WORK, RESCUE_WORK_PER_SET * n), max(SPARE_WORK, SPARE_WORK_PER_SET * n))
    rescued = reserve.filter(pl.col("crowd").is_in(chosen.implode()))
    if settings.tally is not None:
        settings.tally["reserve"] = {
            "buckets": gains.height, "compared": rescued["crowd"].n_unique(),
            "pairs_compared": int(rescued.group_by("crowd").agg(pl.col("skipped").first())["skipped"].sum())}
    block = crowd_pairs_between(rescued.select("crowd", "rep", "band"), (0, n - 1), (0, n - 1))
    if block is None:
        return
    before = held_keys(held.kept, n, rescued["rep"])
    mine: dict = {}  # crowds cut at CROWD_ROOM are counted apart: their remedy is not --max-crowd
    for piece in crowd_pieces(block, sets, 0, sets, 0, threshold, floors=held.floors_now if held.floors is not None
                              else None, tally=mine, group_sizes=settings.group_sizes, top_k=settings.top_k,
                              distinct=settings.distinct_sets, masks=masks):
        keys = piece["left_rep"].to_numpy() * n + piece["right_rep"].to_numpy()
        at = np.minimum(np.searchsorted(before, keys), max(len(before) - 1, 0))
        yield piece.filter(pl.Series(before[at] != keys)) if len(before) else piece
    if settings.tally is not None:
        settings.tally["reserve"]["crowds_cut"] = mine.get("crowds_cut", 0)
