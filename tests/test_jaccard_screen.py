"""The mask screen of verification (lshjob/index/verify/_jaccard.py screened_rows): the same
values as the merge without it, and both as exact brute force with Python sets gives them
(J = |A n B| / |A u B|, kept where J >= t, -1.0 elsewhere); the rows kept by the screen in two
passes over blocks (screened_rows), the same as brute force's, in the candidates' order."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.index.verify._jaccard import SCREEN_BLOCK, element_masks, jaccard_between, screened_rows
from lshjob.index.verify.local import verify_between


def _csr(sets: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    offsets = np.zeros(len(sets) + 1, dtype=np.int64)
    np.cumsum([len(s) for s in sets], out=offsets[1:])
    elements = np.array([e for s in sets for e in sorted(s)], dtype=np.int64)
    return offsets, elements


def _sets(rng: np.random.Generator, n: int) -> list[list[int]]:
    """Long-tailed sizes (1 to a few hundred: masks of 64 bits full too), popular elements
    shared by many, and near-copies, so that pairs fall on both sides of the threshold."""
    popular = rng.zipf(1.3, size=20 * n) % 5000 - 2500  # negative codes too
    out: list[list[int]] = []
    for _ in range(n):
        if out and rng.random() < 0.3:  # a near-copy of an earlier set
            base = list(out[rng.integers(len(out))])
            drop = rng.integers(0, max(1, len(base) // 3) + 1)
            base = base[drop:] + [int(x) for x in rng.integers(-10**12, 10**12, size=rng.integers(0, 3))]
            out.append(sorted(set(base)) or [1])
            continue
        size = int(min(400, max(1, rng.lognormal(1.6, 1.1))))
        out.append(sorted({int(x) for x in rng.choice(popular, size=size)}))
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.8, 1.0])
def test_the_screen_gives_the_merges_values_and_brute_forces(seed, threshold):
    rng = np.random.default_rng(seed)
    sets = _sets(rng, 600)
    offsets, elements = _csr(sets)
    left = rng.integers(0, len(sets), size=20000)
    right = rng.integers(0, len(sets), size=20000)
    # and every pair of near-copies' neighbourhood: many pairs at or near the threshold
    left = np.concatenate([left, np.arange(len(sets) - 1)])
    right = np.concatenate([right, np.arange(1, len(sets))])
    masks = element_masks(offsets, elements)
    rows = screened_rows(offsets, elements, masks, left, 0, offsets, elements, masks, right, 0,
                         np.ones(len(left), dtype=np.int32), threshold)
    screened = np.full(len(left), -1.0)
    at = np.flatnonzero(jaccard_between(offsets, elements, left, offsets, elements, right, threshold) >= threshold)
    assert np.array_equal(rows[0], left[at]) and np.array_equal(rows[1], right[at])  # the merge's pairs, in order
    screened[at] = rows[2]
    merged = jaccard_between(offsets, elements, left, offsets, elements, right, threshold)
    assert np.array_equal(screened, merged)  # the same floats, -1.0 at the same places
    expected = []
    for a, b in zip(left, right):
        x, y = set(sets[a]), set(sets[b])
        j = len(x & y) / len(x | y)
        expected.append(j if j >= threshold else -1.0)
    assert np.array_equal(screened, np.array(expected))
    assert (screened >= threshold).sum() > 50 and (screened < 0).sum() > 50  # both sides were met


def test_a_mask_holds_a_bit_for_each_element_and_no_other():
    sets = [[1], [1, 2], list(range(-50, 50)), [7, 7 + 2**40], []]
    offsets, elements = _csr(sets)
    masks = element_masks(offsets, elements)
    golden = 0x9E3779B97F4A7C15  # 2^64 / phi (Knuth, TAOCP vol. 3, 6.4: Fibonacci hashing)
    for s, mask in zip(sets, masks):
        bits = 0
        for e in s:
            bits |= 1 << (((e % 2**64) * golden % 2**64) >> 58)
        assert int(mask) == bits


def test_verify_between_with_masks_kept_or_made_gives_the_same_rows():
    rng = np.random.default_rng(5)
    sets = _sets(rng, 400)
    offsets, elements = _csr(sets)
    held = ElementSets(pl.Series("entity", np.arange(len(sets))), offsets, elements)
    left = rng.integers(0, 200, size=5000)
    right = rng.integers(200, 400, size=5000)
    chunk = pl.DataFrame({"left_rep": left + 1000, "right_rep": right + 1000,
                          "bands_shared": np.ones(len(left), dtype=np.int32)})
    made = verify_between(chunk, held, 1000, held, 1000, 0.4)
    masks = element_masks(offsets, elements)
    kept = verify_between(chunk, held, 1000, held, 1000, 0.4, (masks, masks))
    assert made.equals(kept) and made.height > 20
    truth = [(a + 1000, b + 1000) for a, b in zip(left, right)
             if len(set(sets[a]) & set(sets[b])) / len(set(sets[a]) | set(sets[b])) >= 0.4]
    assert list(zip(made["left_rep"].to_list(), made["right_rep"].to_list())) == truth


@pytest.mark.parametrize("threshold", [0.3, 0.5, 1.0])
def test_the_rows_kept_block_by_block_are_brute_forces_in_the_candidates_order(threshold):
    """Oracle: exact Jaccard of Python sets, candidate by candidate. More candidates than three
    blocks, and both sides' ids offset (sets held from an entity id on), so rows cross blocks."""
    rng = np.random.default_rng(11)
    sets = _sets(rng, 500)
    offsets, elements = _csr(sets)
    masks = element_masks(offsets, elements)
    n = 3 * SCREEN_BLOCK + 1234
    left, right = rng.integers(0, 250, size=n), rng.integers(250, 500, size=n)
    near = rng.integers(0, 499, size=n // 4)  # neighbours in order: near-copies, pairs at the threshold
    left[: n // 4], right[: n // 4] = near, near + 1
    rng.shuffle(order := np.arange(n))
    left, right = left[order], right[order]
    bands = rng.integers(1, 5, size=n).astype(np.int32)
    got = screened_rows(offsets, elements, masks, left + 700, 700, offsets, elements, masks, right + 900, 900, bands,
                        threshold)
    jaccard = np.array([len(set(sets[a]) & set(sets[b])) / len(set(sets[a]) | set(sets[b]))
                        for a, b in zip(left, right)])
    kept = np.flatnonzero(jaccard >= threshold)
    assert len(kept) > 100 and len(kept) < n  # both sides of the threshold were met
    assert np.array_equal(got[0], left[kept] + 700) and np.array_equal(got[1], right[kept] + 900)
    assert np.array_equal(got[2], jaccard[kept]) and np.array_equal(got[3], bands[kept])
    assert got[4] == 0 and got[5] == 0


def test_ids_outside_the_sets_held_are_counted_by_side_and_refused_by_verification():
    rng = np.random.default_rng(3)
    sets = _sets(rng, 50)
    offsets, elements = _csr(sets)
    masks = element_masks(offsets, elements)
    left = np.array([0, 1, 49, 50, 2])  # 50: one past the last set
    right = np.array([1, -1, 3, 4, 60])
    got = screened_rows(offsets, elements, masks, left, 0, offsets, elements, masks, right, 0,
                        np.ones(5, dtype=np.int32), 0.5)
    assert (got[4], got[5]) == (1, 2)
    assert not np.isin(got[0], [49, 50, 2]).any()  # no row of a pair with an id outside
    held = ElementSets(pl.Series("entity", np.arange(len(sets))), offsets, elements)
    chunk = pl.DataFrame({"left_rep": left + 10, "right_rep": np.array([1, 2, 3, 4, 5]) + 10,
                          "bands_shared": np.ones(5, dtype=np.int32)})
    with pytest.raises(AssertionError, match="left ids outside the sets given"):
        verify_between(chunk, held, 10, held, 10, 0.5)
