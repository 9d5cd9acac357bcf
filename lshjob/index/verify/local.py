"""Local verify engine: candidate pairs -> exact Jaccard from the element sets (not signatures).

Each candidate's sets are intersected by a merge of their sorted element ids (compiled,
both cores, :mod:`lshjob.index.verify._jaccard`); the signature estimate is added for the
pairs kept (:mod:`lshjob.index.verify.estimates`). Contract in :mod:`lshjob.index.verify.base`.
"""

from __future__ import annotations

from functools import partial
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.compile_cache import readonly
from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.index._ranking import list_cuts, own_cuts
from lshjob.index.verify._crowds import crowd_pairs_between, crowd_pieces
from lshjob.index.verify._jaccard import (
    element_masks,
    exact_jaccard_between,
    intersections_of,
    jaccard_from,
    pair_keys,
    pairs_of_keys,
    screened_rows,
)
from lshjob.index.verify._reserve import reserve_pieces
from lshjob.index.verify.base import SetStore, VerifySettings, empty_verified
from lshjob.index.verify.estimates import add_estimates_between
from lshjob.sign.signatures import SignatureParams


class LocalVerify:
    """The verify engine of this process (:class:`lshjob.index.verify.base.VerifyEngine`)."""

    name = "local"

    def verify(self, candidates: Path, sets: SetStore, threshold: float, params: SignatureParams | None,
               settings: VerifySettings, crowds: Path | None = None, reserve: Path | None = None) -> pl.DataFrame:
        return verify_blocks(candidates, sets, threshold, params, settings, crowds, reserve)


def verify_blocks(candidates: Path, store: SetStore, threshold: float, params: SignatureParams | None,
                  settings: VerifySettings, crowds: Path | None = None, reserve: Path | None = None
                  ) -> pl.DataFrame:
    """Exact Jaccard of every candidate, two parts' sets held at a time (P parts cost
    P + P(P-1)/2 loads of saved sets); candidates are read ``settings.slice_rows`` at a time,
    so memory stays bounded whatever their number. ``candidates`` is the join's file (one
    part) or folder (parts); a pair given a row per band is verified per row and kept once,
    with the rows' ``bands_shared`` summed (:func:`one_row_a_pair`). ``crowds``: the join's
    CROWDS file, whose pairs are made here (:mod:`lshjob.index.verify._crowds`). With
    ``settings.top_k``, a block's pairs that can enter neither side's list are dropped before
    their estimates are made (:func:`lshjob.index._ranking.pairs_in_lists`). The floors a
    block's pairs give (each side's cut) are kept for the blocks after it: a cut from some of
    an entity's pairs is a floor for its cut from all of them, so a later block neither seeks
    (its crowds) nor keeps a pair below both its sides' floors. In parts, the estimates wait
    for every block's pairs, cut again together (:func:`_cut_then_estimate`). ``reserve``: the
    join's RESERVE file (one part), whose buckets worth it are compared once the rest is
    (:mod:`lshjob.index.verify._reserve`)."""
    step = settings.slice_rows
    pieces, over = [], 0
    parts = len(store.ranges)
    crowd_table = pl.read_parquet(crowds) if crowds is not None else None
    known = None  # each entity id's floor from the blocks done (with a top-k)
    if settings.top_k is not None and settings.group_sizes is not None:
        known = own_cuts(settings.group_sizes, settings.top_k)
    deferred = parts > 1 and known is not None and params is not None
    for i in range(parts):
        left = left_masks = None
        for j in range(i, parts):
            files = _block_files(candidates, parts, i, j)
            crowded = crowd_pairs_between(crowd_table, store.ranges[i], store.ranges[j])
            held_back = reserve if parts == 1 else None  # the join holds them in reserve in one part only
            if not files and crowded is None and held_back is None:
                continue
            left = store.load(i) if left is None else left
            right = left if j == i else store.load(j)
            screened = files or (crowded is not None and j != i)  # what reads the sets' masks
            if screened and left_masks is None:
                left_masks = element_masks(left.offsets, left.elements)
            masks = (left_masks, left_masks if j == i else element_masks(right.offsets, right.elements)) \
                if screened else None
            cut = None
            if known is not None:
                # in one part the floors come from the block's own pairs, which the cut sees
                cut = partial(_in_lists, group_sizes=settings.group_sizes, top_k=settings.top_k, apart=parts > 1)
            held = HeldRows(settings.held_rows, partial(
                one_row_a_pair, jaccard_of=partial(_exact, left, store.ranges[i][0], right, store.ranges[j][0]),
                held_sets=(readonly(left.offsets), store.ranges[i][0], readonly(right.offsets), store.ranges[j][0])),
                cut, known)
            if files:
                frame = pl.scan_parquet(files, hive_partitioning=False).select("left_rep", "right_rep", "bands_shared")
                for lo, hi in slice_bounds(_rows(files), step):
                    chunk = frame.slice(lo, hi - lo).collect()
                    held.add(verify_between(chunk, left, store.ranges[i][0], right, store.ranges[j][0], threshold,
                                            masks))
            if crowded is not None:
                held.settle()  # the join's pairs give the first floors
                for piece in crowd_pieces(crowded, left, store.ranges[i][0], right, store.ranges[j][0], threshold,
                                          floors=held.floors_now if cut is not None else None,
                                          tally=settings.tally, group_sizes=settings.group_sizes,
                                          top_k=settings.top_k, distinct=settings.distinct_sets, masks=masks):
                    held.add(piece)
            if held_back is not None:  # once the floors are known (lshjob.index.verify._reserve)
                for piece in reserve_pieces(held_back, held, left, threshold, settings, masks=masks):
                    held.add(piece)
            del masks
            block, dropped, already_cut = held.result(), held.dropped, held.cut_current
            if cut is not None:
                known = held.floors
            del held  # its deduplication holds the two parts' sets
            if block is None or block.height == 0:  # no candidate here, or none reached the threshold
                del right
                continue
            over += block.height + dropped
            if cut is not None and not already_cut:  # before the estimates (held rows cut last stay so)
                block, cuts = cut(block, known)
                known = np.maximum(known, cuts)
            if deferred:  # estimates once every block is cut (_cut_then_estimate)
                pieces.append((i, j, block))
            elif params is None:  # identical sets only, no signatures: the estimate is exact
                pieces.append(block.with_columns(estimate=pl.col("jaccard")).select(
                    "left_rep", "right_rep", "jaccard", "estimate", "bands_shared"))
            else:
                pieces.append(add_estimates_between(block, left, store.ranges[i][0], right, store.ranges[j][0],
                                                    params, max_bytes=settings.estimate_bytes))
            del right
    if settings.tally is not None:
        settings.tally["over_threshold"] = over
    if deferred:
        left = left_masks = None  # two parts' sets held at most, as above
        pieces = _cut_then_estimate(pieces, store, params, settings, known)
    return pl.concat(pieces) if pieces else empty_verified()


def _cut_then_estimate(blocks: list, store: SetStore, params: SignatureParams, settings: VerifySettings,
                       floors: np.ndarray) -> list[pl.DataFrame]:
    """The blocks of a run in parts (``(i, j, rows)``, in order) cut again together, as one
    part's pairs are: a side's pairs lie in several blocks, and each block's cut saw only its
    own (at 1M long-tailed entities in 4 parts, 7.3M pairs were kept where one part keeps
    2.3M). Then each block's estimates, its two parts' sets loaded again (a row of blocks
    holds its left part once); the rows in the order they had."""
    if not blocks:
        return []
    whole = pl.concat([rows.with_columns(block=pl.lit(n, dtype=pl.Int32)) for n, (_, _, rows) in enumerate(blocks)])
    kept = _in_lists(whole, floors, settings.group_sizes, settings.top_k)[0]
    by_block = kept.partition_by("block", as_dict=True, include_key=False, maintain_order=True)
    out, held = [], None
    for n, (i, j, _) in enumerate(blocks):
        rows = by_block.get((n,))
        if rows is None or rows.height == 0:
            continue
        held = (i, store.load(i)) if held is None or held[0] != i else held
        left = held[1]
        right = left if j == i else store.load(j)
        out.append(add_estimates_between(rows, left, store.ranges[i][0], right, store.ranges[j][0], params,
                                         max_bytes=settings.estimate_bytes))
    return out


# a deduplication of held rows takes at least this share of their bound new (HeldRows)
FRESH_SHARE = 4


class HeldRows:
    """A block's verified rows as they come, one row a pair: ``dedup`` (:func:`one_row_a_pair`)
    runs when the rows held, those it kept at its last run and those added since, would pass
    ``bound`` (at least ``bound // FRESH_SHARE`` of them new), and once at the end. So the rows a
    deduplication is given are at most ``bound`` plus a piece while it keeps at most
    ``bound - bound // FRESH_SHARE`` of them, and those it keeps plus ``bound // FRESH_SHARE``
    and a piece when it keeps more, whatever the bands a pair repeats in: the memory budget
    sizes ``bound`` (:meth:`lshjob.runtime.budget.Budget.verify_held_rows`). While the rows
    kept stay under ``bound``, a deduplication sorts at most ``FRESH_SHARE`` rows for each
    new one. ``bound`` None: one deduplication at the end.

    ``cut`` (the top-k cut, :func:`_in_lists`), when given, runs after each deduplication but
    the last, so the rows held are bounded by the pairs the lists can take, not by all pairs
    over the threshold. It drops only pairs below both sides' cut among the pairs held; a
    side's cut only rises as pairs come, and dropping pairs below it leaves it where it is, so
    a pair dropped stays below the block's final cut (even if met again in a later band) and a
    pair the final cut keeps was never dropped: the same pairs, with the same rows counted, as
    one cut at the end. ``dropped``: pairs the cuts dropped (a pair met again after being
    dropped counts again). ``cut`` returns the rows kept and each side's cut, kept as the
    floors (:func:`lshjob.index._ranking.list_cuts`; ``floors``: the first ones): a pair
    below both its sides' floors need not be added."""

    def __init__(self, bound: int | None, dedup, cut=None, floors: np.ndarray | None = None) -> None:
        self.bound, self.dedup, self.cut, self.floors = bound, dedup, cut, floors
        self.kept: pl.DataFrame | None = None
        self.fresh: list[pl.DataFrame] = []
        self.fresh_rows = 0
        self.dropped = 0
        self.cut_current = False  # the rows held are cut, none added since

    def add(self, rows: pl.DataFrame) -> None:
        if rows.height == 0:
            return
        self.fresh.append(rows)
        self.fresh_rows += rows.height
        self.cut_current = False
        if self.bound is None or self.fresh_rows < self.bound // FRESH_SHARE:
            return
        if (self.kept.height if self.kept is not None else 0) + self.fresh_rows > self.bound:
            self.settle()

    def settle(self) -> None:
        """Deduplicate the rows added since the last time, and cut them (raising the floors)."""
        if not self.fresh:
            return
        self._dedup()
        if self.cut is not None:
            height = self.kept.height
            self.kept, floors = self.cut(self.kept, self.floors)
            self.floors = floors if self.floors is None else np.maximum(self.floors, floors)
            self.dropped += height - self.kept.height
            self.cut_current = True  # until rows are added: cutting these again keeps them all, same cuts

    def floors_now(self) -> np.ndarray:
        """Each entity id's floor as the rows cut so far give it."""
        return self.floors

    def _dedup(self) -> None:
        # one buffer a column, so the deduplication reads them without copies, and the pieces
        # freed as soon as they are copied there
        rows = pl.concat(([self.kept] if self.kept is not None else []) + self.fresh, rechunk=True)
        self.kept, self.fresh, self.fresh_rows = None, [], 0
        self.kept = self.dedup(rows)

    def result(self) -> pl.DataFrame | None:
        """The rows, one a pair (``bands_shared`` summed), or None when none was added."""
        if self.fresh:
            self._dedup()
        return self.kept


def _in_lists(pairs: pl.DataFrame, floors: np.ndarray | None, group_sizes, top_k: int, apart: bool = True
              ) -> tuple[pl.DataFrame, np.ndarray]:
    """The pairs that can enter a list, and each side's cut (:func:`lshjob.index._ranking.list_cuts`);
    with ``floors`` (by entity id: cuts from other pairs) and ``apart`` (they may come from
    pairs these are not: other blocks of parts), a pair below both its sides' floors is
    dropped too. Not ``apart``, the floors come from these pairs' cuts, so the filter would
    drop nothing (0.18 s a cut of 10M pairs)."""
    left, right, jaccard = pairs["left_rep"].to_numpy(), pairs["right_rep"].to_numpy(), pairs["jaccard"].to_numpy()
    keep, cuts = list_cuts(left, right, jaccard, group_sizes, top_k)
    if apart and floors is not None and len(left):
        keep &= (jaccard >= floors[left]) | (jaccard >= floors[right])
    return pairs.filter(pl.Series(keep)), cuts


def verify_between(candidates: pl.DataFrame, left_sets: ElementSets, left_first: int,
                   right_sets: ElementSets, right_first: int, threshold: float,
                   masks: tuple[np.ndarray, np.ndarray] | None = None) -> pl.DataFrame:
    """Exact Jaccard of each candidate, kept where it reaches ``threshold`` (``left_rep``,
    ``right_rep``, ``jaccard``, ``bands_shared``, in the order of the candidates). The left
    entities' sets are ``left_sets`` (entity id ``left_first + i`` is its set i), the right
    ones' ``right_sets`` (from ``right_first``): the sets held a key range at a time.
    ``masks``: both sides' :func:`lshjob.index.verify._jaccard.element_masks`, when the caller
    keeps them for several calls (made here otherwise)."""
    if masks is None:
        left_masks = element_masks(left_sets.offsets, left_sets.elements)
        masks = (left_masks, left_masks if right_sets is left_sets else
                 element_masks(right_sets.offsets, right_sets.elements))
    # a chunk of the columns at a time (the Parquet file's row groups): read-only views, no copy
    columns = [candidates.get_column(name) for name in ("left_rep", "right_rep", "bands_shared")]
    chunks = [column.get_chunks() for column in columns]
    if len({tuple(len(chunk) for chunk in pieces) for pieces in chunks}) != 1:
        chunks = [[column.rechunk()] for column in columns]
    kept = [screened_rows(left_sets.offsets, left_sets.elements, masks[0], _ids(left, np.int64), left_first,
                          right_sets.offsets, right_sets.elements, masks[1], _ids(right, np.int64), right_first,
                          _ids(bands, np.int32), threshold) for left, right, bands in zip(*chunks)]
    for side, first, size, at in (("left", left_first, left_sets.size, 4), ("right", right_first, right_sets.size, 5)):
        if any(rows[at] for rows in kept):
            raise AssertionError(f"{side} ids outside the sets given ({first}..{first + size - 1})")
    left, right, jac, bands = (np.concatenate([rows[i] for rows in kept]) for i in range(4))
    return pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": jac, "bands_shared": bands})


def one_row_a_pair(verified: pl.DataFrame, jaccard_of=None, held_sets=None) -> pl.DataFrame:
    """Verified rows with one row per pair: a join that wrote a row per band a pair met in
    (:mod:`lshjob.index.join.base`) repeats the pair, with the same Jaccard; its
    ``bands_shared`` is the sum of its rows'. A pair lies in one block of parts, so a block's
    rows hold all of a pair's. ``held_sets``: (left offsets, left first id, right offsets,
    right first id) of the sets held (as in :func:`verify_between`), and ``jaccard_of(left,
    right)``: the exact Jaccard of pairs, when the caller holds the sets. They let
    the rows be deduplicated by sorting 64-bit keys alone, a third of the time of ordering the
    rows: the pair, its intersection (from the Jaccard and the sizes, J = i / (|A| + |B| - i))
    and its rows' bands in one key (an intersection too large for the bits left is capped, and
    those pairs' Jaccard taken again from the sets), the Jaccard then divided again from the
    intersection (the same float as the kernels' division); else the pair and its rows'
    bands while ids fit 26 bits, or the pair alone for rows of one band each while they fit 32,
    the Jaccard taken again from the sets."""
    left, right = verified["left_rep"].to_numpy(), verified["right_rep"].to_numpy()
    if len(left) < 2:
        return verified
    bands = verified["bands_shared"].to_numpy()
    if held_sets is not None and left.min() >= 0 and bands.min() >= 1:
        packed = _one_row_packed(left, right, verified["jaccard"].to_numpy(), bands, held_sets, jaccard_of)
        if packed is not None:
            return verified if packed is True else packed.select(verified.columns)
    if jaccard_of is not None and right.max() < 2**26 and left.min() >= 0 and bands.min() >= 1 and bands.max() < 2**12:
        # pair and bands in one 64-bit key (26 + 26 + 12 bits): one sort of the keys alone, the
        # bands summed over each pair's run, the Jaccard taken again from the sets
        key = ((left.astype(np.uint64) << np.uint64(38)) | (right.astype(np.uint64) << np.uint64(12))
               | bands.astype(np.uint64))
        key.sort()
        pair = key >> np.uint64(12)
        starts = np.flatnonzero(np.concatenate([[True], pair[1:] != pair[:-1]]))
        if len(starts) == len(key):
            return verified
        counts = np.add.reduceat((key & np.uint64(0xFFF)).astype(np.int64), starts).astype(np.int32)
        pair = pair[starts]
        left = (pair >> np.uint64(26)).astype(np.int64)
        right = (pair & np.uint64(2**26 - 1)).astype(np.int64)
        return pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": jaccard_of(left, right),
                             "bands_shared": counts}).select(verified.columns)
    if right.max() < 2**32 and left.min() >= 0:  # one packed 64-bit key a pair: a numpy sort, no hash table
        key = (left.astype(np.uint64) << np.uint64(32)) | right.astype(np.uint64)
        if jaccard_of is not None and bands.min() == 1 and bands.max() == 1:
            key.sort()
            starts = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]]))
            if len(starts) == len(key):
                return verified
            counts = np.diff(np.append(starts, len(key))).astype(np.int32)
            key = key[starts]
            left = (key >> np.uint64(32)).astype(np.int64)
            right = (key & np.uint64(0xFFFFFFFF)).astype(np.int64)
            return pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": jaccard_of(left, right),
                                 "bands_shared": counts}).select(verified.columns)
        order = np.argsort(key)
        key = key[order]
        starts = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]]))
        if len(starts) == len(key):
            return verified
        bands = np.add.reduceat(bands[order], starts).astype(np.int32)
        return verified[order[starts]].with_columns(bands_shared=pl.Series(bands))
    return (verified.group_by("left_rep", "right_rep")
            .agg(pl.col("jaccard").first(), pl.col("bands_shared").sum())
            .select(verified.columns))


def _one_row_packed(left: np.ndarray, right: np.ndarray, jaccard: np.ndarray, bands: np.ndarray, held_sets,
                    jaccard_of=None):
    """:func:`one_row_a_pair` by one sort of (pair, intersection, bands) keys: the rows, True
    when every pair has one row, or None when the pair and bands leave the intersection no bit
    of the 64 (or too few, without ``jaccard_of`` for the pairs whose intersection is capped).
    10M entities need 24 + 24 + 6 bits, leaving 10: intersections of 1023 and more (rare) are
    capped, instead of intersecting every pair again (38 s of a 706 s run)."""
    left = np.ascontiguousarray(left, dtype=np.int64)
    right = np.ascontiguousarray(right, dtype=np.int64)
    inter = intersections_of(left, right, np.ascontiguousarray(jaccard, dtype=np.float64), *held_sets)
    id_bits, band_bits = int(max(left.max(), right.max())).bit_length(), int(bands.max()).bit_length()
    inter_bits = min(max(int(inter.max()).bit_length(), 1), 64 - 2 * id_bits - band_bits)
    cap = (1 << inter_bits) - 1 if inter_bits > 0 else 0
    capped = inter_bits > 0 and int(inter.max()) > cap
    if inter_bits < 1 or (capped and jaccard_of is None):
        return None
    if capped:
        np.minimum(inter, cap, out=inter)
    key = pair_keys(left, right, inter, np.ascontiguousarray(bands, dtype=np.int64), id_bits, inter_bits, band_bits)
    del inter
    key.sort()
    left, right, inter, counts = pairs_of_keys(key, id_bits, inter_bits, band_bits)
    del key
    if len(left) == len(jaccard):
        return True
    jac = jaccard_from(left, right, inter, *held_sets)
    if capped and (at := np.flatnonzero(inter == cap)).size:
        jac[at] = jaccard_of(left[at], right[at])
    return pl.DataFrame({"left_rep": left, "right_rep": right, "jaccard": jac, "bands_shared": counts})


def _exact(left_sets: ElementSets, left_first: int, right_sets: ElementSets, right_first: int,
           left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """Exact Jaccard of pairs of entity ids, the sets held as in :func:`verify_between`."""
    return exact_jaccard_between(left_sets.offsets, left_sets.elements, left - left_first,
                                 right_sets.offsets, right_sets.elements, right - right_first)


def _ids(column: pl.Series, dtype) -> np.ndarray:
    """A column chunk as a read-only view (:func:`lshjob.core.compile_cache.readonly`)."""
    return readonly(column.to_numpy().astype(dtype, copy=False))


def _block_files(candidates: Path, parts: int, i: int, j: int) -> list[str]:
    if parts == 1 and candidates.is_file():
        return [str(candidates)]
    return sorted(str(p) for p in (candidates / f"left_part={i}" / f"right_part={j}").glob("*.parquet"))


def _rows(files: list[str]) -> int:
    return pl.scan_parquet(files, hive_partitioning=False).select(pl.len()).collect().item()
