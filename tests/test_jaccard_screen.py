"""The mask screen of verification (lshjob/index/verify/_jaccard.py jaccard_screened): the same
values as the merge without it, and both as exact brute force with Python sets gives them
(J = |A n B| / |A u B|, kept where J >= t, -1.0 elsewhere)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from lshjob.core.sets import ElementSets
from lshjob.index.verify._jaccard import element_masks, jaccard_between, jaccard_screened
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
    screened = jaccard_screened(offsets, elements, masks, left, offsets, elements, masks, right, threshold)
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
