"""The kernel of crowds whose members lie in two key ranges (a run in parts): every pair of a
member of each side, by set size, screened and merged (:mod:`lshjob.index.verify._crowds`
makes the crowds and reads what it writes)."""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba
from lshjob.index.verify._crowd_index import need_for
from lshjob.index.verify._jaccard import _bits, _intersection


@numba.njit(parallel=True, cache=True)
def _crowd_pairs(left_offsets, left_elements, left_masks, left_first, right_offsets, right_elements, right_masks,
                 right_first, a_members, a_start, a_count, b_members, b_start, b_count, same, base, threshold,
                 left_floor, right_floor, out_left, out_right, out_jac, found):
    """Crowd c pairs its a-members ``a_members[a_start[c]:a_start[c] + a_count[c]]`` (entity ids
    of the left sets, by set size ascending) with its b-members (right sets, by size); ``same``:
    both sides are one range, so the pairs are those of the a-members, x < y. The pairs whose
    Jaccard reaches ``threshold`` are written from slot ``base[c]`` on, in the order they are
    made (row-major), their number in ``found[c]`` (filters as in
    :func:`lshjob.index.verify._jaccard.screened_rows`, the sets' masks
    ``left_masks``/``right_masks`` by set first). Sizes ascending, so once a partner is more
    than |A| / threshold the rest are too (the size filter ends the loop).

    ``left_floor``/``right_floor`` (by set, as the masks; empty for none): each set's top-k
    floor (:func:`lshjob.index._ranking.list_cuts`). A pair below both its sides' floors
    enters neither list, so it is sought at max(threshold, min(floor a, floor b)): its size
    filter and the intersection its masks must allow grow with it, and it is written only
    when it reaches it.

    Each crowd's b-members' ids, starts, sizes, masks and floors are gathered once into arrays
    of their own, read in order by every a-member (before: four random reads a pair, by entity
    id); and since both sides ascend by size, the b-members too small for an a-member (below
    threshold x |A|) are too small for the next ones, so each a-member starts where the last
    one's size filter began."""
    for c in numba.prange(a_start.shape[0]):
        na = a_count[c]
        nb = na if same else b_count[c]
        b_ids = a_members[a_start[c]:a_start[c] + na] if same else b_members[b_start[c]:b_start[c] + nb]
        b_at = np.empty(nb, dtype=np.int64)
        b_size = np.empty(nb, dtype=np.int64)
        b_mask = np.empty(nb, dtype=np.uint64)
        b_floor = np.full(nb, -1.0)
        for y in range(nb):
            r = b_ids[y] - right_first
            b_at[y] = right_offsets[r]
            b_size[y] = right_offsets[r + 1] - right_offsets[r]
            b_mask[y] = right_masks[r]
            if len(right_floor):
                b_floor[y] = right_floor[r]
        p = base[c]
        low = 0
        for x in range(na):
            left = a_members[a_start[c] + x]
            a0, a1 = left_offsets[left - left_first], left_offsets[left - left_first + 1]
            la = a1 - a0
            ma = left_masks[left - left_first]
            floor_a = left_floor[left - left_first] if len(left_floor) else -1.0
            while low < nb and b_size[low] < threshold * la - 1e-9:
                low += 1  # too small for this member and every later (larger) one
            for y in range(max(low, x + 1) if same else low, nb):
                lb = b_size[y]
                if la < threshold * lb - 1e-9:
                    break  # every later partner is at least as large
                sought = max(threshold, min(floor_a, b_floor[y]))
                if lb >= sought * la - 1e-9 and la >= sought * lb - 1e-9:
                    need = need_for(la, lb, sought)
                    mb = b_mask[y]
                    if min(la - np.int64(_bits(ma & ~mb)), lb - np.int64(_bits(mb & ~ma))) < need:
                        continue  # the masks' bound on |A n B| is below what the pair is sought at
                    inter = _intersection(left_elements, a0, a1, right_elements, b_at[y], b_at[y] + lb, need)
                    value = inter / (la + lb - inter)
                    if inter >= need and value >= sought:
                        right = b_ids[y]
                        out_left[p] = min(left, right)
                        out_right[p] = max(left, right)
                        out_jac[p] = value
                        p += 1
        found[c] = p - base[c]
