"""Text keys to positions by a hash table (lshjob.ingest.text_keys).

Oracle: a Python dict from each sorted distinct key to its position (and, for the ingest,
ElementSets.from_sets, which codes text by polars' dense rank)."""

from __future__ import annotations

import unicodedata

import numpy as np
import polars as pl
import pytest

import lshjob.ingest.text_keys as text_keys
from lshjob.core.sets import ElementSets, nfc_codes
from lshjob.errors import InputError
from lshjob.ingest.loading import _codes, load_membership
from lshjob.ingest.spec import EventSpec
from lshjob.ingest.text_keys import TextPositions


def _words(rng, n, alphabet="abcdefghij\u00e9\u2014\U0001f4da"):
    return ["".join(rng.choice(list(alphabet), rng.integers(0, 8))) for _ in range(n)]


def _oracle(keys: pl.Series, values: list[str]) -> np.ndarray:
    at = {k: i for i, k in enumerate(keys.to_list())}
    return np.array([at.get(v, -1) for v in values], dtype=np.int64)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_positions_match_a_dict_with_absent_values(seed):
    rng = np.random.default_rng(seed)
    keys = pl.Series(_words(rng, 3000)).unique().sort()
    values = keys.to_list()[::3] + _words(rng, 2000)  # keys, and words that may be none
    got = TextPositions(keys)(pl.Series(values))
    want = _oracle(keys, values)
    assert (want == -1).any() and (want >= 0).any()
    np.testing.assert_array_equal(got, want)


def test_one_hash_for_every_key_still_gives_exact_positions(monkeypatch):
    # every key and value hashed alike: the table proposes one key for all, and the check
    # sends each value whose proposal is wrong to the search
    rng = np.random.default_rng(5)
    keys = pl.Series(_words(rng, 500)).unique().sort()
    values = keys.to_list()[::-1] + ["not a key", "zzzz", ""]
    monkeypatch.setattr(text_keys, "_hashes", lambda series: np.zeros(len(series), dtype=np.uint64))
    got = TextPositions(keys)(pl.Series(values))
    np.testing.assert_array_equal(got, _oracle(keys, values))


def test_empty_keys_and_values():
    assert TextPositions(pl.Series([], dtype=pl.String))(pl.Series(["a"])).tolist() == [-1]
    assert TextPositions(pl.Series(["a"]))(pl.Series([], dtype=pl.String)).tolist() == []


def test_nfc_codes_leave_the_dictionary_as_read():
    title = "Le Petit Prince \u2014 Saint-Exup\u00e9ry"
    dictionary = pl.Series([unicodedata.normalize("NFD", title), title]).sort()
    before = dictionary.to_list()
    canonical, remap = nfc_codes(dictionary)
    assert dictionary.to_list() == before
    assert canonical.to_list() == [title] and remap.tolist() == [0, 0]


def test_an_element_missing_from_the_dictionary_names_the_file():
    with pytest.raises(InputError, match="loans.parquet: the files changed"):
        _codes(pl.Series(["b"]), (TextPositions(pl.Series(["a"])), None), "loans.parquet")


@pytest.mark.parametrize("text_patrons", [True, False])  # False: numbered patrons, the reader's two-pass way
def test_text_keyed_events_group_as_from_sets(tmp_path, text_patrons):
    # Oracle: ElementSets.from_sets on the deduplicated rows (polars' dense rank of the texts)
    rng = np.random.default_rng(3)
    numbers = rng.integers(0, 4000, 30000)
    patrons = [f"patron-{i}" for i in numbers] if text_patrons else numbers
    titles = [f"title-{i}" for i in rng.zipf(1.3, 30000) % 9000]
    events = pl.DataFrame({"patron": patrons, "title": titles})
    path = tmp_path / "loans.parquet"
    events.write_parquet(path, row_group_size=7000)
    got, _ = load_membership(path, EventSpec(entity="patron", element="title"))
    want = ElementSets.from_sets(events.rename({"patron": "entity", "title": "element"}).unique())
    assert got.keys.to_list() == want.keys.to_list()
    np.testing.assert_array_equal(got.offsets, want.offsets)
    np.testing.assert_array_equal(got.elements, want.elements)
    np.testing.assert_array_equal(got.text_hashes, want.text_hashes)
