"""Signing straight from grouped events (lshjob/sign/events.py) against signing sets."""

import numpy as np
import polars as pl
import pytest
from helpers import sign_element_lists

from lshjob import EventSpec, SignatureParams
from lshjob.sign.events import sign_events
from lshjob.sign.signatures import signature_array


@pytest.mark.parametrize("scheme", ["kperm", "oph"])
@pytest.mark.parametrize("text", [False, True], ids=["integer", "text"])
def test_signing_from_events_equals_signing_each_set(tmp_path, scheme, text):
    # Oracle: sign_element_lists over Python sets built from the same events (each set's
    # distinct elements), which hashes each element key's text and signs row by row.
    rng = np.random.default_rng(11)
    sizes = rng.integers(1, 300, size=400)  # sets well past the first table size (64 slots)
    entity = np.repeat(rng.choice(10**6, size=400, replace=False), sizes)
    element = rng.integers(-10**12, 10**12, size=4000)[rng.integers(0, 4000, size=len(entity))]
    events = pl.DataFrame({"patron": entity, "title": element})
    events = pl.concat([events, events.sample(fraction=0.3, seed=1)])  # repeated loans
    if text:
        events = events.with_columns(pl.format("T-{}", "title").alias("title"))
    path = tmp_path / "loans.parquet"
    events.sample(fraction=1.0, shuffle=True, seed=2).write_parquet(path)
    params = SignatureParams(scheme=scheme, perms=64, seed=9)

    table, report = sign_events(path, EventSpec(entity="patron", element="title"), params)

    truth = events.group_by("patron").agg(pl.col("title").unique()).sort("patron")
    assert table["entity"].to_list() == truth["patron"].to_list()
    assert table["set_size"].to_list() == truth["title"].list.len().to_list()
    expected = sign_element_lists(truth["title"].to_list(), params)
    assert np.array_equal(signature_array(table), expected)
    assert report.sets == 400 and report.membership_rows == truth["title"].list.len().sum()


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_the_signature_file_streamed_in_slices_holds_the_signed_table(tmp_path, monkeypatch, scheme, weighted):
    # Oracle: sign_element_lists over the Python sets of the events. `lshjob sign` signs and
    # writes 37 entities at a time here (uneven slices, the last one short); the file must
    # hold every entity once, in key order, with the reference signatures and sizes. Weighted
    # (a count column, --min-count 2), the sets keep the elements whose counts sum to 2 or more.
    from helpers import SliceCounter

    from lshjob.core import slicing
    from lshjob.jobs.sign import sign_file
    from lshjob.sign.signatures import read_signatures

    rng = np.random.default_rng(4)
    sizes = rng.integers(1, 60, size=300)
    events = pl.DataFrame({"patron": np.repeat(np.arange(300) * 7, sizes),
                           "title": rng.integers(0, 2000, size=sizes.sum()),
                           "loans": rng.integers(1, 3, size=sizes.sum())})
    path = tmp_path / "loans.parquet"
    events.sample(fraction=1.0, shuffle=True, seed=3).write_parquet(path)
    params = SignatureParams(scheme=scheme, perms=32, seed=2)
    monkeypatch.setattr(slicing, "SLICE_ROWS", 37)
    spec = EventSpec(entity="patron", element="title", count="loans" if weighted else None,
                     min_count=2 if weighted else 1)
    counter = SliceCounter()
    summary = sign_file(path, tmp_path / "sig.parquet", spec, params, progress=counter)
    table, meta = read_signatures(tmp_path / "sig.parquet")
    kept = (events.group_by("patron", "title").agg(pl.col("loans").sum()).filter(pl.col("loans") >= 2)
            if weighted else events)
    truth = kept.group_by("patron").agg(pl.col("title").unique()).sort("patron")
    assert table["entity"].to_list() == truth["patron"].to_list()
    assert table["set_size"].to_list() == truth["title"].list.len().to_list()
    assert np.array_equal(signature_array(table), sign_element_lists(truth["title"].to_list(), params))
    assert summary["signatures"] == truth.height > 250
    assert counter.slices == -(-truth.height // 37)  # written 37 at a time
    assert summary["ingest"]["membership_rows"] == truth["title"].list.len().sum()
    assert meta["set_size"] == "exact" and not list(tmp_path.glob(".*"))
