"""Band stage: bucket keys follow their documented definition (lshjob/index/band.py)."""

import numpy as np
import polars as pl

from lshjob.index.band import BAND_MULTIPLIER, bucket_keys, bucket_rows
from test_hashing import fmix64_reference as fmix64  # MurmurHash3 fmix64 in Python integers

MASK = (1 << 64) - 1


def test_bucket_keys_follow_the_definition():
    # Oracle: Horner's rule mod 2**64 and fmix64 in Python integers, values near 2**64 so
    # that every product and sum wraps.
    rng = np.random.default_rng(3)
    sig = rng.integers(2**63, 2**64 - 1, size=(7, 12), dtype=np.uint64)
    sig[0, :] = 2**64 - 1
    keys = bucket_keys(sig, np.arange(7), bands=3, rows=4)
    for i in range(7):
        for j in range(3):
            h = j
            for t in range(4):
                h = (h * BAND_MULTIPLIER + int(sig[i, j * 4 + t])) & MASK
            assert keys[str(j)][i] == fmix64(h)


def test_rows_differing_in_one_position_never_share_a_bucket():
    # Algebra: with an odd multiplier, Horner's rule is injective in each position.
    rng = np.random.default_rng(4)
    base = rng.integers(0, 2**63, size=(1, 8), dtype=np.uint64)
    sig = np.repeat(base, 9, axis=0)
    for t in range(8):
        sig[t + 1, t] ^= np.uint64(1 << (t * 7))
    rows = bucket_rows(sig, np.arange(9), bands=1, rows=8)
    assert rows["bucket"].n_unique() == 9


def test_shared_bucket_rows_are_exactly_the_buckets_of_two_or_more(tmp_path):
    # Oracle: polars group-by counts per (band, bucket) over every bucket row.
    import polars as pl

    from lshjob.index.band import write_shared_bucket_rows

    rng = np.random.default_rng(6)
    sig = rng.integers(0, 3, size=(500, 8), dtype=np.uint64)  # few values: many shared buckets
    sig[:100] = rng.integers(0, 2**63, size=(100, 8), dtype=np.uint64)  # and many of one
    keys = bucket_keys(sig, np.arange(500), bands=4, rows=2)
    every = bucket_rows(sig, np.arange(500), bands=4, rows=2)
    expected = every.filter(pl.len().over("band", "bucket") >= 2).sort("band", "bucket", "rep")
    # the whole key table, and the same table given as three slices
    for n, given in enumerate((keys, [keys[:150], keys[150:151], keys[151:]])):
        files, written = write_shared_bucket_rows(given, 4, tmp_path / f"b{n}", batch_bytes=500 * 28 * 3)
        assert len(files) == 2  # batches of three bands, then one
        got = pl.read_parquet(files).sort("band", "bucket", "rep")
        assert written == got.height == expected.height > 0
        assert got.equals(expected)


def test_shared_positions_are_exactly_the_repeated_keys():
    # Oracle: polars is_duplicated, and a sort by (key, position). A bitmap of 2**8 slots over
    # 2,000 keys marks far more rows than repeat (every false mark must be dropped); 2**26
    # slots marks almost none but the repeats.
    from lshjob.index.band import _shared
    from helpers import fmix64_np

    rng = np.random.default_rng(8)
    keys = fmix64_np(rng.integers(0, 1500, size=2000).astype(np.uint64))  # ~500 repeats
    frame = pl.DataFrame({"key": keys, "pos": np.arange(2000)})
    expected = frame.filter(pl.col("key").is_duplicated()).sort("key", "pos")["pos"].to_list()
    assert len(expected) > 500
    for log2_slots in (8, 26):
        assert _shared(keys, log2_slots).tolist() == expected
    # 200,000 keys are split into partitions (about 2**15 keys each) before the search
    many = fmix64_np(rng.integers(0, 150_000, size=200_000).astype(np.uint64))
    frame = pl.DataFrame({"key": many, "pos": np.arange(len(many))})
    expected = frame.filter(pl.col("key").is_duplicated()).sort("key", "pos")["pos"].to_list()
    for log2_slots in (16, 23):
        assert _shared(many, log2_slots).tolist() == expected


def test_signatures_by_position_are_the_transposed_comparable_signatures():
    # Oracle: the row layout (signed and densified separately), transposed.
    from lshjob.core.sets import Membership
    from lshjob.sign.signatures import SignatureParams, comparable, comparable_by_position, sign_membership

    import polars as pl

    rng = np.random.default_rng(9)
    sizes = rng.integers(1, 60, size=700)
    sets = Membership.from_sets(pl.DataFrame({
        "entity": np.repeat(np.arange(700), sizes),
        "element": np.concatenate([rng.choice(300, size=s, replace=False) for s in sizes]),
    }))
    ids = rng.choice(700, size=600, replace=False)
    for scheme in ("kperm", "oph"):
        p = SignatureParams(scheme=scheme, perms=64, seed=5)
        rows = comparable(sign_membership(sets, ids, p), p)
        assert np.array_equal(comparable_by_position(sets, ids, p), rows.T)
