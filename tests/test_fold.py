"""One fold per scheme (lshjob/sign/_fold.py): every signing entry point gives the signatures
of the documented definition, byte for byte."""

import numpy as np
import polars as pl
import pytest
import xxhash
from helpers import sign_element_lists
from test_hashing import fmix64_reference

from lshjob import EventSpec, SignatureParams
from lshjob.core.sets import ElementSets
from lshjob.ingest.loading import read_grouped
from lshjob.sign.signatures import (
    comparable_by_position,
    sign_membership,
    signature_array,
)
from lshjob.sign.slices import SetRows, sign_slices

MASK = (1 << 64) - 1


def splitmix64(seed: int, n: int) -> list[int]:
    # SplitMix64 (Steele, Lea and Flood, OOPSLA 2014), in Python integers.
    state, out = seed, []
    for _ in range(n):
        state = (state + 0x9E3779B97F4A7C15) & MASK
        z = ((state ^ (state >> 30)) * 0xBF58476D1CE4E5B9) & MASK
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
        out.append(z ^ (z >> 31))
    return out


def by_definition(sets: list[list[str]], scheme: str, k: int, seed: int) -> np.ndarray:
    """DEVELOPERS.md, "The hash family", items 1 to 4, in Python integers with outside parts:
    the xxhash package for XXH64 of the key's UTF-8 text (seed 0), MurmurHash3's fmix64
    transcribed (test_hashing.fmix64_reference), Lemire's range reduction ((x >> 32) * k) >> 32."""
    rows = []
    for elements in sets:
        hashes = {xxhash.xxh64_intdigest(e.encode()) for e in elements}
        if scheme == "kperm":
            salts = splitmix64(seed, k)
            rows.append([min(fmix64_reference(h ^ s) for h in hashes) for s in salts])
        else:
            s0, s1, _ = splitmix64(seed, 3)
            row = [MASK] * k  # 2**64 - 1: an empty bin
            for h in hashes:
                b = ((fmix64_reference(h ^ s0) >> 32) * k) >> 32
                row[b] = min(row[b], fmix64_reference(h ^ s1))
            rows.append(row)
    return np.array(rows, dtype=np.uint64)


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
@pytest.mark.parametrize("text", [False, True], ids=["integer", "text"])
def test_every_signing_entry_point_follows_the_definition(tmp_path, scheme, text):
    # Oracle: by_definition above (the documented hash family, outside parts), on random sets
    # of random sizes with elements repeated across sets; the events repeat elements within
    # a set too (the grouped kernel must count and fold each once).
    rng = np.random.default_rng(5)
    k, seed, n = 24, 31, 37
    sizes = rng.integers(1, 40, size=n)
    pool = rng.integers(-10**15, 10**15, size=300)
    entity = np.repeat(np.sort(rng.choice(10**6, size=n, replace=False)), sizes)
    element = np.concatenate([rng.choice(pool, size=s, replace=False) for s in sizes])
    rows = pl.DataFrame({"entity": entity, "element": element})
    if text:
        rows = rows.with_columns(pl.format("título {}", "element").alias("element"))
    truth = rows.group_by("entity", maintain_order=True).agg("element")
    sets = [[str(e) for e in s] for s in truth["element"].to_list()]
    params = SignatureParams(scheme=scheme, perms=k, seed=seed)
    expected = by_definition(sets, scheme, k, seed)

    # CSR kernels: element hashes in place, codes hashed in the loop or looked up in a table
    assert np.array_equal(sign_element_lists(sets, params), expected)
    members = ElementSets.from_sets(rows)
    assert np.array_equal(sign_membership(members, np.arange(n), params), expected)
    if scheme == "kperm":  # laid out by position, the first 10 positions only
        assert np.array_equal(comparable_by_position(members, np.arange(n), params, 10), expected[:, :10].T)

    # the slice generator over its three inputs, 8 sets a slice
    from_members = pl.concat(sign_slices(members, params, 8))
    from_rows = pl.concat(sign_slices(SetRows(rows.sort("entity", "element"), ["entity"]), params, 8))
    events = pl.concat([rows, rows.sample(fraction=0.5, seed=3)]).sample(fraction=1.0, shuffle=True, seed=4)
    events.rename({"entity": "patron", "element": "title"}).write_parquet(tmp_path / "loans.parquet")
    grouped = read_grouped(tmp_path / "loans.parquet", EventSpec(entity="patron", element="title"))
    from_events = pl.concat(sign_slices(grouped, params, 8))
    for table in (from_members, from_rows, from_events):
        assert table["entity"].to_list() == truth["entity"].to_list()
        assert table["set_size"].to_list() == sizes.tolist()
        assert np.array_equal(signature_array(table), expected)
    assert grouped.report.sets == n and grouped.report.membership_rows == sizes.sum()
