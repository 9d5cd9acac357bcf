"""MinHash signatures: accuracy against exact Jaccard and datasketch, algebra, files."""

import json
import subprocess
import sys

import numpy as np
import polars as pl
import pytest
from datasketch import MinHash
from helpers import sign_element_lists
from hypothesis import given, settings
from hypothesis import strategies as st

from lshjob import IncompatibleSignatures, SignatureParams, read_signatures, write_signatures
from lshjob.sign.signatures import (
    estimate_jaccard,
    estimate_set_size,
    merge_signatures,
    signature_array,
    signature_column,
    signature_metadata,
)
from lshjob.sign.slices import sign_sets

K = 128


def long_tailed_pairs(seed: int, n_pairs: int = 1500):
    """Pairs (A, B) with long-tailed sizes and Zipf-popular elements, and their exact Jaccard."""
    rng = np.random.default_rng(seed)
    pairs, truth = [], []
    for _ in range(n_pairs):
        size = int(np.clip(rng.lognormal(3.3, 0.9), 2, 2000))
        universe = rng.zipf(1.5, size * 3) + rng.integers(0, 10**9)  # popular ids repeat
        pool = list(dict.fromkeys(universe.tolist()))
        share = rng.random()
        n_shared = int(len(pool) * share / 2)
        half = (len(pool) - n_shared) // 2
        a = set(pool[: n_shared + half])
        b = set(pool[:n_shared]) | set(pool[n_shared + half :])
        if not a or not b:
            continue
        pairs.append((sorted(a), sorted(b)))
        truth.append(len(a & b) / len(a | b))
    return pairs, np.array(truth)


def our_estimates(pairs, seed):
    sigs = sign_element_lists([s for p in pairs for s in p], SignatureParams(perms=K, seed=seed))
    return estimate_jaccard(sigs[0::2], sigs[1::2])


def bias_z(est, truth, k=K):
    """z-score of the mean error. Each estimate is a mean of k Bernoulli(J) trials, so its
    variance is J(1-J)/k (binomial); the mean of n independent errors has variance
    sum(J(1-J)/k)/n^2."""
    var = truth * (1 - truth) / k
    return (est - truth).mean() / np.sqrt(var.sum()) * len(truth)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_estimates_are_unbiased_and_within_binomial_error(seed):
    # Oracle: exact Jaccard by set intersection on the generated sets.
    pairs, truth = long_tailed_pairs(seed)
    est = our_estimates(pairs, seed)
    assert abs(bias_z(est, truth)) < 4.0
    # Mean absolute error: for a normal error with s.d. sigma = sqrt(J(1-J)/k),
    # E|error| = sigma * sqrt(2/pi). Allow 15% for the normal approximation and sampling.
    sigma = np.sqrt(truth * (1 - truth) / K)
    expected_mae = (sigma * np.sqrt(2 / np.pi)).mean()
    assert np.abs(est - truth).mean() < 1.15 * expected_mae


def test_bias_check_catches_a_weak_affine_family():
    # The check above must be able to fail: an affine family with even multipliers that
    # keeps only 12 high bits ties often on large sets and biases estimates upward.
    pairs, truth = long_tailed_pairs(5, 600)
    rng = np.random.default_rng(0)
    a = (rng.integers(1, 2**62, K, dtype=np.uint64) * np.uint64(2))
    b = rng.integers(0, 2**62, K, dtype=np.uint64)

    def weak_sig(s):
        x = np.array(s, dtype=np.uint64)[:, None]
        return ((a * x + b) >> np.uint64(52)).min(axis=0)

    est = np.array([np.mean(weak_sig(p[0]) == weak_sig(p[1])) for p in pairs])
    assert bias_z(est, truth) > 4.0


def test_error_no_worse_than_datasketch():
    # Oracle: datasketch.MinHash (reference library) at the same k on the same sets.
    pairs, truth = long_tailed_pairs(7, 800)
    ours = np.abs(our_estimates(pairs, 1) - truth)
    theirs = []
    for a, b in pairs:
        ma, mb = MinHash(num_perm=K, seed=1), MinHash(num_perm=K, seed=1)
        ma.update_batch([str(x).encode() for x in a])
        mb.update_batch([str(x).encode() for x in b])
        theirs.append(ma.jaccard(mb))
    theirs = np.abs(np.array(theirs) - truth)
    diff = ours - theirs
    # Paired comparison: ours may exceed theirs only by sampling noise (3 standard errors).
    assert diff.mean() < 3 * diff.std(ddof=1) / np.sqrt(len(diff))


element_sets = st.lists(st.integers(0, 10**6), min_size=1, max_size=60)


@settings(max_examples=60, deadline=None)
@given(element_sets, element_sets)
def test_merge_equals_signing_the_union(a, b):
    # Algebra (Broder 1997): min over A u B = min(min over A, min over B), position-wise.
    p = SignatureParams(perms=32, seed=9)
    sa, sb, su = sign_element_lists([a, b, a + b], p)
    assert np.array_equal(np.minimum(sa, sb), su)


@settings(max_examples=40, deadline=None)
@given(element_sets, st.randoms())
def test_signature_ignores_order_and_repeats(a, rnd):
    shuffled = list(a) + list(a[: len(a) // 2])
    rnd.shuffle(shuffled)
    p = SignatureParams(perms=16, seed=3)
    x, y = sign_element_lists([a, shuffled], p)
    assert np.array_equal(x, y)


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_integer_and_text_keys_sign_alike(scheme):
    # Integers hash through their decimal text (hashing.py), so both readings of a column agree;
    # the membership path (codes, dictionary hashes) must agree with the row path too.
    from lshjob.core.sets import ElementSets
    from lshjob.sign.signatures import sign_membership

    p = SignatureParams(scheme=scheme, perms=16)
    values = [10, 20, 10, -7, 0, 2**62]
    ints = pl.DataFrame({"entity": [1, 1, 2, 2, 3, 3], "element": values})
    text = ints.with_columns(pl.col("element").cast(pl.String))
    unsigned = pl.DataFrame({"entity": [1, 1, 2], "element": pl.Series([2**64 - 1, 5, 5], dtype=pl.UInt64)})
    by_rows = sign_sets(ints, ["entity"], p)["signature"].to_list()
    assert by_rows == sign_sets(text, ["entity"], p)["signature"].to_list()
    for rows in (ints, text):
        sets = ElementSets.from_sets(rows)
        assert sign_membership(sets, np.arange(sets.size), p).tolist() == by_rows
    big = ElementSets.from_sets(unsigned)  # above int64: coded as text
    assert big.text_hashes is not None
    assert sign_membership(big, np.arange(2), p).tolist() == sign_sets(
        unsigned.with_columns(pl.col("element").cast(pl.String)), ["entity"], p)["signature"].to_list()


def test_set_size_estimate_within_its_error():
    # Oracle: the true size; (k-1)/sum(u) has relative s.d. about 1/sqrt(k-2) (Gamma law).
    p = SignatureParams(perms=256)
    sizes = [50, 400, 3000]
    sigs = sign_element_lists([[f"e{i}" for i in range(n)] for n in sizes], p)
    est = estimate_set_size(sigs)
    assert np.all(np.abs(est / sizes - 1) < 4 / np.sqrt(254))


def _table(p):
    sets = pl.DataFrame({"entity": ["a", "a", "b"], "element": ["x", "y", "x"]})
    return sign_sets(sets, ["entity"], p)


def test_merging_files_with_different_parameters_is_refused(tmp_path):
    for name, p in (("a", SignatureParams(perms=16, seed=1)), ("b", SignatureParams(perms=16, seed=2))):
        write_signatures(_table(p), tmp_path / f"{name}.parquet", signature_metadata(p, ["entity"]))
    tables = [read_signatures(tmp_path / "a.parquet"), read_signatures(tmp_path / "b.parquet")]
    with pytest.raises(IncompatibleSignatures, match="different seed"):
        merge_signatures(tables, ["entity"])


def test_file_metadata_and_contract(tmp_path):
    p = SignatureParams(perms=24, seed=5)
    path = write_signatures(_table(p), tmp_path / "s.parquet", signature_metadata(p, ["entity"]))
    table, meta = read_signatures(path)
    assert (meta["scheme"], meta["k"], meta["seed"], meta["format_version"]) == ("kperm", 24, 5, 1)
    assert table.schema["signature"] == pl.List(pl.UInt64)
    assert table["signature"].list.len().to_list() == [24, 24]
    assert table["set_size"].to_list() == [2, 1]
    assert json.loads(pl.read_parquet_metadata(path)["lshjob"])["hash"] == meta["hash"]


SIGN_SCRIPT = """
import sys
from lshjob import EventSpec, SignatureParams, sign_file
sign_file(sys.argv[1], sys.argv[2], EventSpec(entity="patron", element="title",
          time="borrowed_at", period="month"), SignatureParams(perms=64, seed=42))
"""


def test_same_input_and_seed_give_byte_identical_files_across_processes(tmp_path, demo_events):
    events, _ = demo_events
    src = tmp_path / "events.parquet"
    events.write_parquet(src)
    outs = []
    for i in range(2):
        out = tmp_path / f"sig{i}.parquet"
        subprocess.run([sys.executable, "-c", SIGN_SCRIPT, str(src), str(out)], check=True)
        outs.append(out.read_bytes())
    assert outs[0] == outs[1]
    table, _ = read_signatures(tmp_path / "sig0.parquet")
    assert signature_array(table).shape[1] == 64


def test_signature_follows_its_documented_definition():
    # Oracle: the definition in DEVELOPERS.md computed with outside parts: the xxhash
    # package for XXH64, Python integers for fmix64 (MurmurHash3.cpp) and SplitMix64.
    import xxhash
    from test_hashing import fmix64_reference

    mask = (1 << 64) - 1
    state, salts = 77, []
    for _ in range(8):
        state = (state + 0x9E3779B97F4A7C15) & mask
        z = ((state ^ (state >> 30)) * 0xBF58476D1CE4E5B9) & mask
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask
        salts.append(z ^ (z >> 31))
    elements = ["Moby Dick", "T000123", "", "Ünïcode título", "42"]
    expected = [min(fmix64_reference(xxhash.xxh64_intdigest(e.encode()) ^ s) for e in elements) for s in salts]
    got = sign_element_lists([elements], SignatureParams(perms=8, seed=77))[0]
    assert [int(v) for v in got] == expected


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_sign_file_streaming_path_equals_the_grouped_path(tmp_path, demo_events, scheme):
    # Oracle: the group-by path (load_sets + sign_sets), which signs row by row; one set per
    # entity goes through the streaming loader and must give the same table.
    from lshjob import EventSpec, load_sets, read_signatures, sign_file

    events, _ = demo_events
    src = tmp_path / "events.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", count="loans", min_count=2)
    p = SignatureParams(scheme=scheme, perms=32, seed=9)
    sign_file(src, tmp_path / "s.parquet", spec, p)
    got, _ = read_signatures(tmp_path / "s.parquet")
    expected = sign_sets(load_sets(src, spec)[0], ["entity"], p)
    assert got.equals(expected)


def test_kperm_positions_are_a_prefix_of_longer_signatures():
    # Algebra: salts are one SplitMix64 sequence, so signing with k'=96 gives the first 96
    # positions of k=128 (the run signs only the positions its bands read).
    sets = [[f"t{i}" for i in range(n)] for n in (1, 7, 300)]
    long = sign_element_lists(sets, SignatureParams(perms=128, seed=5))
    short = sign_element_lists(sets, SignatureParams(perms=96, seed=5))
    assert np.array_equal(long[:, :96], short)


def test_merging_many_tables_is_the_row_minimum_per_key():
    # Reference: brute force in Python, each key's rows gathered from every table in any
    # order and reduced with numpy's element-wise minimum. Keys repeat within and across
    # the three tables, which arrive unsorted; two key columns are kept.
    rng = np.random.default_rng(11)
    k, expected, tables = 16, {}, []
    for size in (40, 25, 60):
        keys = pl.DataFrame({"entity": rng.integers(0, 12, size), "segment": rng.choice(["a", "b"], size)})
        matrix = rng.integers(0, 2**54, (size, k), dtype=np.uint64)  # minima of about 1000 elements
        for key, row in zip(keys.iter_rows(), matrix):
            expected[key] = row if key not in expected else np.minimum(expected[key], row)
        tables.append((keys.with_columns(signature_column(matrix)), {"scheme": "kperm", "k": k}))
    empty = tables[0][0].clear()  # a table with no rows (a month without loans) changes nothing
    merged, meta = merge_signatures([(empty, tables[0][1]), *tables], ["entity", "segment"])
    assert merged.select("entity", "segment").rows() == sorted(expected)
    assert np.array_equal(signature_array(merged), np.stack([expected[key] for key in sorted(expected)]))
    assert merged["set_size"].to_list() == np.round(estimate_set_size(signature_array(merged))).astype(int).tolist()
    assert meta["set_size"] == "estimated"


def test_monthly_signatures_streamed_in_slices_equal_signing_at_once(tmp_path, demo_events, monkeypatch):
    # Reference: sign_sets over the whole membership table at once (itself checked against
    # datasketch above). `lshjob sign` with segments and periods writes 7 sets at a time here.
    from helpers import SliceCounter

    from lshjob import EventSpec, sign_file
    from lshjob.core import slicing
    from lshjob.ingest.spec import load_sets

    events, _ = demo_events
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month")
    p = SignatureParams(perms=16, seed=3)
    monkeypatch.setattr(slicing, "SLICE_ROWS", 7)
    counter = SliceCounter()
    summary = sign_file(src, tmp_path / "monthly.parquet", spec, p, progress=counter)
    table, meta = read_signatures(tmp_path / "monthly.parquet")
    sets, _ = load_sets(src, spec)
    expected = sign_sets(sets, spec.key_columns, p)
    assert table.height == summary["signatures"] == expected.height > 1000
    assert counter.slices == -(-expected.height // 7)  # written 7 at a time
    assert table.equals(expected)
    assert meta["keys"] == ["entity", "segment", "period"]
