"""The refresh state's bucket tables (lshjob.jobs.refresh_buckets) and the store's file checks.

Oracles: brute force over Python tuples (every row of every table, filtered with plain
comparisons), hashlib's SHA-256 of the written bytes, and a byte flipped by hand.
"""

from __future__ import annotations

import hashlib
from datetime import datetime

import numpy as np
import polars as pl
import pytest

from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import refresh_buckets as buckets
from lshjob.jobs.refresh import RefreshOptions, refresh_job
from lshjob.store import catalog
from lshjob.store import files as store_files


def _table(rng, sets: np.ndarray, bands: int) -> dict[int, np.ndarray]:
    # few distinct keys, so that buckets hold several sets
    return {b: rng.integers(0, 12, len(sets)).astype(np.uint64) * np.uint64(2**61 + 7) for b in range(bands)}


def test_lookup_finds_exactly_the_live_rows_of_the_buckets_asked_for(tmp_path):
    # Oracle: brute force over the (band, bucket, set) tuples of both tables.
    rng = np.random.default_rng(5)
    bands = 4
    old_sets, new_sets = rng.permutation(30).astype(np.int64), np.arange(30, 41, dtype=np.int64)
    old_keys, new_keys = _table(rng, old_sets, bands), _table(rng, new_sets, bands)
    made = []
    for name, sets, keys in (("a", old_sets, old_keys), ("b", new_sets, new_keys)):
        made.append(buckets.write(tmp_path, f"{name}.{buckets.SUFFIX}", bands, "run", keys.__getitem__, sets))
    written = (tmp_path / made[0].path).read_bytes()
    assert made[0].sha256 == hashlib.sha256(written).hexdigest()  # oracle: hashlib over the file's bytes
    assert made[0].bytes == len(written) == 8 * (2 + 2 * bands * len(old_sets))
    live = np.ones(41, dtype=bool)
    live[[3, 17, 35]] = False  # forgotten sets
    queries = [np.unique(new_keys[b]) for b in range(bands)]
    found = buckets.rows_in([tmp_path / m.path for m in made], queries, live)
    everything = [(b, int(k), int(s)) for sets, keys in ((old_sets, old_keys), (new_sets, new_keys))
                  for b in range(bands) for s, k in zip(sets, keys[b])]
    expected = sorted(r for r in everything if live[r[2]] and r[1] in set(new_keys[r[0]].tolist()))
    assert sorted(found.iter_rows()) == expected
    assert len(expected) > len(new_sets) * bands  # old sets were met, not only the new ones


def test_compaction_keeps_every_live_row_once_sorted_by_band_and_bucket(tmp_path):
    # Oracle: brute force over the tuples of the two tables; the file's layout read back with numpy.
    rng = np.random.default_rng(8)
    bands = 3
    parts = [(np.arange(0, 20, dtype=np.int64), None), (np.arange(20, 26, dtype=np.int64), None)]
    paths, rows = [], []
    for i, (sets, _) in enumerate(parts):
        keys = _table(rng, sets, bands)
        paths.append(tmp_path / buckets.write(tmp_path, f"{i}.{buckets.SUFFIX}", bands, "r", keys.__getitem__,
                                              sets).path)
        rows += [(b, int(k), int(s)) for b in range(bands) for s, k in zip(sets, keys[b])]
    live = np.ones(26, dtype=bool)
    live[[0, 21]] = False
    made = buckets.compact(tmp_path, paths, "all." + buckets.SUFFIX, bands, live, "r")
    words = np.fromfile(tmp_path / made.path, dtype="<u8")
    n = int(words[1])
    assert (int(words[0]), n) == (bands, 24)
    back = []
    for b in range(bands):
        keys, ids = words[2 + 2 * b * n:2 + 2 * b * n + n], words[2 + 2 * b * n + n:2 + 2 * (b + 1) * n]
        assert list(zip(keys.tolist(), ids.tolist())) == sorted(zip(keys.tolist(), ids.tolist()))
        back += [(b, int(k), int(s)) for k, s in zip(keys, ids)]
    assert sorted(back) == sorted(r for r in rows if live[r[2]])


def test_a_small_store_file_changed_in_place_is_refused_as_damaged(tmp_path):
    # Oracle: one byte of the state's members table flipped by hand (same size): the SHA-256
    # recorded in the catalog no longer matches, and the next refresh says so in one line.
    spec = EventSpec(entity="patron", element="title", time="borrowed_at", period="month")
    options = RefreshOptions(window=2, threshold=0.5, top_k=3)
    rng = np.random.default_rng(2)
    batch = pl.DataFrame({"patron": rng.integers(0, 30, 300), "title": rng.integers(0, 20, 300),
                          "borrowed_at": [datetime(2026, 3, 1 + int(d)) for d in rng.integers(0, 28, 300)]})
    batch.write_parquet(tmp_path / "b.parquet")
    refresh_job(tmp_path / "b.parquet", tmp_path / "store", spec, options, tmp_path / "index")
    (members,) = [f for f in catalog.read_state(tmp_path / "store").files if f.kind == "members"]
    assert members.bytes < store_files.HASH_BELOW
    path = tmp_path / "store" / members.path
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(ParameterError, match="the store is damaged .*members.parquet"):
        refresh_job(tmp_path / "b.parquet", tmp_path / "store", spec, options, tmp_path / "index")


def test_pairs_of_a_build_from_nothing_are_the_brute_force_pairs_with_their_bands(tmp_path):
    # Oracle: brute force: every two sets compared band by band with ==.
    rng = np.random.default_rng(11)
    bands = 5
    sets = rng.permutation(40).astype(np.int64)
    keys = {b: rng.integers(0, 9, len(sets)).astype(np.uint64) * np.uint64(3**39) for b in range(bands)}
    made = buckets.write(tmp_path, "t." + buckets.SUFFIX, bands, "r", keys.__getitem__, sets)
    pairs, largest = buckets.all_pairs(tmp_path / made.path, cap=1000)
    key_of = {(b, int(s)): int(k) for b in range(bands) for s, k in zip(sets, keys[b])}
    expected = {}
    for a in range(40):
        for c in range(a + 1, 40):
            shared = sum(key_of[(b, a)] == key_of[(b, c)] for b in range(bands))
            if shared:
                expected[(a, c)] = shared
    assert {(r[0], r[1]): r[2] for r in pairs.iter_rows()} == expected
    assert pairs.height == len(expected)
    assert largest == max(int(np.unique(keys[b], return_counts=True)[1].max()) for b in range(bands))
    _, over = buckets.all_pairs(tmp_path / made.path, cap=2)
    assert over > 2
