"""Band stage, local engine: its kernel and layout (the stage contract is checked for every
engine by lshjob/index/conformance.py, run in tests/test_engines.py)."""

import numpy as np
import polars as pl

from lshjob.index.band import ROW_BYTES, LocalBand


def test_rows_differing_in_one_position_never_share_a_bucket():
    # Algebra: with an odd multiplier, Horner's rule is injective in each position.
    rng = np.random.default_rng(4)
    base = rng.integers(0, 2**63, size=(1, 8), dtype=np.uint64)
    sig = np.repeat(base, 9, axis=0)
    for t in range(8):
        sig[t + 1, t] ^= np.uint64(1 << (t * 7))
    keys = LocalBand().keys(np.ascontiguousarray(sig.T), np.arange(9), bands=1, rows=8)
    assert keys["0"].n_unique() == 9


def test_shared_rows_are_written_a_batch_of_bands_at_a_time(tmp_path):
    # Which rows are written is the conformance check (lshjob.index.conformance.check_band);
    # here, the local engine's batches: bands_per_batch(500 rows, 4 bands, 3 bands' bytes) = 3,
    # so one file of bands 0-2 and one of band 3 (oracle: the band numbers in each file).
    rng = np.random.default_rng(6)
    sig = rng.integers(0, 3, size=(500, 8), dtype=np.uint64)
    keys = LocalBand().keys(np.ascontiguousarray(sig.T), np.arange(500), bands=4, rows=2)
    out = LocalBand().shared_rows([keys], 4, tmp_path, batch_bytes=500 * ROW_BYTES * 3)
    assert [sorted(pl.read_parquet(f)["band"].unique().to_list()) for f in out.files] == [[0, 1, 2], [3]]


def test_shared_positions_are_exactly_the_repeated_keys():
    # Oracle: polars is_duplicated, and a sort by (key, position). A bitmap of 2**8 slots over
    # 2,000 keys marks far more rows than repeat (every false mark must be dropped); 2**26
    # slots marks almost none but the repeats.
    from helpers import fmix64_np

    from lshjob.index.band._shared import _shared

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
    import polars as pl

    from lshjob.core.sets import ElementSets
    from lshjob.sign.signatures import SignatureParams, comparable, comparable_by_position, sign_membership

    rng = np.random.default_rng(9)
    sizes = rng.integers(1, 60, size=700)
    sets = ElementSets.from_sets(pl.DataFrame({
        "entity": np.repeat(np.arange(700), sizes),
        "element": np.concatenate([rng.choice(300, size=s, replace=False) for s in sizes]),
    }))
    ids = rng.choice(700, size=600, replace=False)
    for scheme in ("kperm", "oph"):
        p = SignatureParams(scheme=scheme, perms=64, seed=5)
        rows = comparable(sign_membership(sets, ids, p), p)
        assert np.array_equal(comparable_by_position(sets, ids, p), rows.T)
