"""One-permutation hashing with densification: accuracy, composability, never mixed."""

import numpy as np
import polars as pl
import pytest
from helpers import sign_element_lists
from hypothesis import given, settings
from hypothesis import strategies as st
from test_signatures import bias_z, long_tailed_pairs

from lshjob import IncompatibleSignatures, SignatureParams
from lshjob.jobs.run import RunOptions, run_job
from lshjob.sign.oph import EMPTY, densify
from lshjob.sign.signatures import (
    comparable,
    estimate_jaccard,
    merge_signatures,
    signature_metadata,
)
from lshjob.sign.slices import sign_sets

K = 128
OPH = SignatureParams(scheme="oph", perms=K, seed=1)


def oph_estimates(pairs, params=OPH):
    sigs = comparable(sign_element_lists([s for p in pairs for s in p], params), params)
    return estimate_jaccard(sigs[0::2], sigs[1::2])


def designed_pairs(shared: int, own: int, n: int):
    """Pairs sharing `shared` elements, each with `own` of its own: J = shared/(shared+2*own)."""
    pairs = []
    for i in range(n):
        base = [f"d{i}-s{j}" for j in range(shared)]
        pairs.append((base + [f"d{i}-a{j}" for j in range(own)], base + [f"d{i}-b{j}" for j in range(own)]))
    return pairs, np.full(n, shared / (shared + 2 * own))


@pytest.mark.parametrize("seed", [1, 2])
def test_oph_unbiased_on_long_tailed_sets(seed):
    # Oracle: exact Jaccard by set intersection. Optimal densification is unbiased
    # (Shrivastava, ICML 2017, Theorem 3); its variance is close to binomial for sets of
    # at least k elements, so the tolerance is the one used for k-permutation, widened by 20%.
    pairs, truth = long_tailed_pairs(seed)
    est = oph_estimates(pairs, SignatureParams(scheme="oph", perms=K, seed=seed))
    assert abs(bias_z(est, truth)) < 4.0
    sigma = np.sqrt(truth * (1 - truth) / K)
    assert np.abs(est - truth).mean() < 1.2 * 1.15 * (sigma * np.sqrt(2 / np.pi)).mean()


@pytest.mark.parametrize("shared, own", [(2, 1), (12, 6), (40, 10)])
def test_oph_unbiased_for_sets_smaller_than_k(shared, own):
    # Oracle: the designed Jaccard. Sets of 3 to 60 elements leave most of the 128 bins
    # empty, so densification does most of the work. Unbiasedness: the mean error over 1500
    # independent pairs is within 4 empirical standard errors of 0.
    pairs, truth = designed_pairs(shared, own, 1500)
    err = oph_estimates(pairs) - truth
    assert abs(err.mean()) < 4 * err.std(ddof=1) / np.sqrt(len(err))
    # Densified bins repeat values, so the error exceeds the binomial one: allow 1.5x.
    assert np.abs(err).mean() < 1.5 * np.sqrt(truth[0] * (1 - truth[0]) / K) * np.sqrt(2 / np.pi)


def test_bias_check_catches_a_naive_densification():
    # The check above must be able to fail: filling empty bins with a constant makes two
    # small sets agree wherever both are empty, biasing estimates upward.
    pairs, truth = designed_pairs(2, 1, 500)
    raw = sign_element_lists([s for p in pairs for s in p], OPH)
    naive = np.where(raw == EMPTY, np.uint64(0), raw)
    err = estimate_jaccard(naive[0::2], naive[1::2]) - truth
    assert err.mean() > 4 * err.std(ddof=1) / np.sqrt(len(err))


element_sets = st.lists(st.integers(0, 10**6), min_size=1, max_size=60)


@settings(max_examples=60, deadline=None)
@given(element_sets, element_sets)
def test_stored_oph_signatures_merge_as_the_union(a, b):
    # Algebra: per bin, min over A u B = min(min over A, min over B); an empty bin is
    # 2**64 - 1, the identity of min. Densified signatures are compared, never stored.
    p = SignatureParams(scheme="oph", perms=32, seed=4)
    sa, sb, su = sign_element_lists([a, b, a + b], p)
    assert np.array_equal(np.minimum(sa, sb), su)
    assert np.array_equal(comparable(np.minimum(sa, sb)[None, :], p), comparable(su[None, :], p))


def test_densifying_before_merging_would_break_the_union():
    # Why densification waits until comparison: for two disjoint small sets, merging
    # densified signatures differs from densifying the merged one.
    p = SignatureParams(scheme="oph", perms=64, seed=4)
    sa, sb, su = sign_element_lists([["x1"], ["y1"], ["x1", "y1"]], p)
    salt = np.uint64(12345)
    early = np.minimum(densify(sa[None, :], salt, False), densify(sb[None, :], salt, False))
    assert not np.array_equal(early, densify(su[None, :], salt, False))


def test_schemes_are_never_mixed():
    sets = pl.DataFrame({"entity": ["a", "b"], "element": ["x", "y"]})
    k = SignatureParams(scheme="kperm", perms=16)
    o = SignatureParams(scheme="oph", perms=16)
    tables = [(sign_sets(sets, ["entity"], p), signature_metadata(p, ["entity"])) for p in (k, o)]
    with pytest.raises(IncompatibleSignatures, match="different scheme"):
        merge_signatures(tables, ["entity"])


def test_run_with_oph_finds_planted_pairs(tmp_path):
    # Oracle: scipy brute force (shared helper); prediction from the S-curve.
    from helpers import planted_pairs
    from test_run import SPEC, brute_force_pairs, published_pairs

    from lshjob.plan.banding import candidate_probability

    events = planted_pairs(1000, 0.3, seed=6)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    m = run_job(src, SPEC, RunOptions(threshold=0.5, scheme="oph", perms=128, bands=20, rows=5, top_k=500),
                tmp_path / "idx")
    truth = brute_force_pairs(events, 0.5)
    got = published_pairs(tmp_path / "idx")
    measured = sum(p in got for p in truth) / len(truth)
    predicted = float(np.mean(candidate_probability(np.array(list(truth.values())), 20, 5)))
    assert abs(measured - predicted) < 0.04, (measured, predicted)
    assert m["options"]["scheme"] == "oph"


def _fmix64(x: int) -> int:
    """MurmurHash3's fmix64 in Python integers (Appleby, smhasher, MurmurHash3.cpp)."""
    m = 2**64 - 1
    x ^= x >> 33
    x = (x * 0xFF51AFD7ED558CCD) & m
    x ^= x >> 33
    x = (x * 0xC4CEB9FE1A85EC53) & m
    return x ^ (x >> 33)


def _densified_by_definition(row: list[int], salt: int, k: int) -> list[int]:
    """Optimal densification as the module docstring defines it, probe after probe."""
    empty = 2**64 - 1
    if all(v == empty for v in row):
        return list(row)
    out = list(row)
    for i in range(k):
        a = 1
        while out[i] == empty:
            j = ((_fmix64(salt ^ ((i << 32) | a)) >> 32) * k) >> 32
            out[i] = row[j]
            a += 1
    return out


@pytest.mark.parametrize("k", [8, 128, 512, 600])
def test_densification_follows_its_definition(k):
    # Oracle: the definition, probe by probe in Python integers. Rows from one non-empty bin
    # (so some bins need more probes than are ranked) to full ones, and an empty row; k past
    # 512 takes the tabled probes instead of the ranks. Signing and densifying a row at a
    # time (all positions, or the first few) must equal densifying the stored signatures.
    from lshjob.sign._oph import sign_densified, sign_oph

    rng = np.random.default_rng(k)
    salt = 0x5DEECE66D1234567
    rows = np.full((12, k), EMPTY, dtype=np.uint64)
    for r, filled in enumerate([1, 1, 2, 3, 5, k // 4, k // 2, k - 1, k, 0, 1, 7]):
        bins = rng.choice(k, size=min(filled, k), replace=False)
        rows[r, bins] = rng.integers(0, 2**63, size=len(bins), dtype=np.uint64)
    got = densify(rows, np.uint64(salt), False)
    for r in range(len(rows)):
        assert got[r].tolist() == _densified_by_definition(rows[r].tolist(), salt, k)
    assert np.array_equal(densify(rows, np.uint64(salt), True), got.T)

    sizes = rng.integers(1, 3 * k, 40)
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    codes = rng.integers(-10**9, 10**9, offsets[-1])
    salts = np.array([11, 12, salt], dtype=np.uint64)
    ids = rng.permutation(40).astype(np.int64)
    stored = sign_oph(offsets, codes, np.empty(0, np.uint64), ids, k, salts)
    whole = densify(stored, np.uint64(salt), True)
    for positions in (k, k // 2 + 1):  # the band stage reads the first b x r positions only
        assert np.array_equal(sign_densified(offsets, codes, np.empty(0, np.uint64), ids, k, salts, positions),
                              whole[:positions])
