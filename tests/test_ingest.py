"""Ingest: formats, options and every kind of bad input (clear error, nothing written)."""

import re

import numpy as np
import polars as pl
import pytest

from lshjob import EventSpec, InputError, ParameterError, load_sets, sign_file

SPEC = EventSpec(entity="patron", element="title")


def test_repeated_events_count_once(small_events):
    sets, report = load_sets(small_events, SPEC)
    assert sets.filter(pl.col("entity") == "ann")["element"].to_list() == ["t1", "t2"]
    assert report.rows_read == 6 and report.sets == 3 and report.membership_rows == 5


@pytest.mark.parametrize("fmt", ["csv", "ndjson", "parquet"])
def test_formats_glob_and_directory_agree(tmp_path, small_events, fmt):
    frame = pl.read_parquet(small_events)
    folder = tmp_path / "in"
    folder.mkdir()
    half = frame.height // 2
    for i, part in enumerate((frame[:half], frame[half:])):
        path = folder / f"part{i}.{fmt}"
        getattr(part, f"write_{fmt}")(path)
    expected, _ = load_sets(small_events, SPEC)
    for source in (folder, str(folder / f"*.{fmt}")):
        got, report = load_sets(source, SPEC)
        assert got.equals(expected)
        assert len(report.files) == 2


def test_min_count_uses_the_count_column_and_reports_emptied_sets(small_events):
    spec = EventSpec(entity="patron", element="title", count="loans", min_count=2)
    sets, report = load_sets(small_events, spec)
    # ann/t2 has loans 2+1, cy/t9 has 3; bob has nothing left.
    assert sorted(sets.select("entity", "element").rows()) == [("ann", "t2"), ("cy", "t9")]
    assert report.empty_after_filter == 1 and "bob" in report.empty_examples[0]


def test_segment_and_period_sign_separately(small_events):
    spec = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month")
    sets, _ = load_sets(small_events, spec)
    ann = sets.filter(pl.col("entity") == "ann").select("segment", "period", "element").rows()
    assert [(s, str(p), e) for s, p, e in ann] == [
        ("Harbour", "2026-01-01", "t1"),
        ("Harbour", "2026-02-01", "t2"),
        ("Hilltop", "2026-02-01", "t2"),
    ]


def test_integer_keys_are_accepted(tmp_path):
    path = tmp_path / "ints.csv"
    path.write_text("patron,title\n1,100\n1,200\n2,100\n")
    sets, _ = load_sets(path, SPEC)
    assert sets["entity"].dtype.is_integer() and sets["element"].dtype.is_integer()
    assert sorted(sets.select("entity", "element").rows()) == [(1, 100), (1, 200), (2, 100)]


def expect_input_error(tmp_path, source, spec, *fragments):
    out = tmp_path / "out" / "sig.parquet"
    with pytest.raises(InputError) as err:
        sign_file(source, out, spec)
    for fragment in fragments:
        assert fragment in str(err.value)
    assert not out.parent.exists() or not any(out.parent.iterdir()), "nothing may be written"


def test_missing_path(tmp_path):
    expect_input_error(tmp_path, tmp_path / "nope.parquet", SPEC, "nope.parquet", "no such file")


def test_unreadable_file(tmp_path):
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(b"this is not parquet")
    expect_input_error(tmp_path, bad, SPEC, "broken.parquet", "cannot be read as parquet")


def test_unknown_extension(tmp_path):
    bad = tmp_path / "loans.xlsx"
    bad.write_bytes(b"x")
    expect_input_error(tmp_path, bad, SPEC, "loans.xlsx", "unknown file type")


def test_missing_column_lists_the_columns(tmp_path, small_events):
    spec = EventSpec(entity="reader", element="title")
    expect_input_error(
        tmp_path, small_events, spec, "loans.parquet", "'reader'", "columns are: patron, title, branch"
    )


def test_wrong_type(tmp_path):
    path = tmp_path / "floats.parquet"
    pl.DataFrame({"patron": ["a"], "title": [1.5]}).write_parquet(path)
    expect_input_error(tmp_path, path, SPEC, "floats.parquet", "'title'", "Float64")


def test_null_keys_counted_and_located(tmp_path):
    path = tmp_path / "nulls.parquet"
    pl.DataFrame({"patron": ["a", None, "b", None], "title": ["x", "y", "z", "w"]}).write_parquet(path)
    expect_input_error(tmp_path, path, SPEC, "nulls.parquet", "'patron'", "2 null", "row 2", "--on-null drop")


def test_null_keys_dropped_on_request(tmp_path):
    path = tmp_path / "nulls.parquet"
    pl.DataFrame({"patron": ["a", None, "b"], "title": ["x", "y", None]}).write_parquet(path)
    sets, report = load_sets(path, EventSpec(entity="patron", element="title", on_null="drop"))
    assert sets.select("entity", "element").rows() == [("a", "x")]
    assert report.null_rows_dropped == 2


def test_empty_input(tmp_path):
    path = tmp_path / "empty.parquet"
    pl.DataFrame(schema={"patron": pl.String, "title": pl.String}).write_parquet(path)
    expect_input_error(tmp_path, path, SPEC, "empty.parquet", "0 rows")


def test_everything_filtered_out(tmp_path, small_events):
    spec = EventSpec(entity="patron", element="title", count="loans", min_count=50)
    expect_input_error(tmp_path, small_events, spec, "loans.parquet", "--min-count 50")


def test_bad_time_text(tmp_path):
    path = tmp_path / "times.csv"
    path.write_text("patron,title,at\na,x,2026-01-02\nb,y,last tuesday\n")
    spec = EventSpec(entity="patron", element="title", time="at", period="week")
    expect_input_error(tmp_path, path, spec, "times.csv", "'at'", "'last tuesday'")


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"on_null": "skip"}, "--on-null"),
        ({"period": "month"}, "--period needs --time"),
        ({"time": "t"}, "--time needs --period"),
        ({"period": "year", "time": "t"}, "--period must be one of"),
        ({"min_count": 0}, "--min-count must be a finite number > 0; got 0"),
        ({"min_count": -1}, "--min-count must be a finite number > 0; got -1"),
        ({"min_count": float("nan")}, "--min-count must be a finite number > 0; got nan"),
        ({"min_count": float("inf")}, "--min-count must be a finite number > 0; got inf"),
        ({"element": "patron"}, "--entity and --element name the same column 'patron'"),
        ({"segment": "patron"}, "--entity and --segment name the same column 'patron'"),
        ({"count": "title"}, "--element and --count name the same column 'title'"),
        ({"time": "title", "period": "day"}, "--element and --time name the same column 'title'"),
        ({"count": "n", "segment": "n", "time": "n", "period": "day"},
         "--count, --segment and --time name the same column 'n'"),
    ],
)
def test_bad_options(kwargs, message):
    # Oracle: the option bounds and the one-column-per-role rule as the README states them.
    with pytest.raises(ParameterError, match=re.escape(message)):
        EventSpec(**{"entity": "patron", "element": "title", **kwargs})


@pytest.mark.parametrize(
    "spec",
    [
        EventSpec(entity="patron", element="title"),
        EventSpec(entity="patron", element="title", min_count=2),
        EventSpec(entity="patron", element="title", count="loans", min_count=3),
        EventSpec(entity="branch", element="patron"),
    ],
    ids=["plain", "min-count", "count-column", "few-entities"],
)
def test_streaming_loader_matches_the_grouped_rows(small_events, spec):
    # Oracle: polars' group-by path (load_sets) turned into sets; the streaming loader must
    # give the same entities, the same set sizes and the same element hashes, set by set.
    from helpers import element_hashes

    from lshjob.core.sets import ElementSets
    from lshjob.ingest.loading import load_membership

    expected = ElementSets.from_sets(load_sets(small_events, spec)[0])
    got, report = load_membership(small_events, spec)
    assert got.keys.to_list() == expected.keys.to_list()
    assert np.array_equal(got.offsets, expected.offsets)
    exp_h = element_hashes(expected)
    got_h = element_hashes(got)
    for i in range(expected.size):  # codes may differ (dictionary over kept elements); hashes may not
        a, b = expected.offsets[i], expected.offsets[i + 1]
        assert sorted(got_h[a:b]) == sorted(exp_h[a:b])
    assert report.sets == expected.size and report.membership_rows == len(expected.elements)


def test_streaming_loader_integer_keys_and_batches(tmp_path, monkeypatch):
    # Oracle: a Python dict of sets. Integer entities that are sparse (binary search), in a
    # small range with gaps and negative keys (positions ranked after reading), and dense
    # but read with a separate key pass (direct table); repeated events, and batches smaller
    # than the input.
    import lshjob.ingest.loading as loading
    from lshjob.runtime import budget

    rng = np.random.default_rng(5)
    cases = [(rng.integers(-10**15, 10**15, 300), 1 << 16), (np.arange(300), 1 << 16),
             (rng.choice(np.arange(-2000, 2000), 300, replace=False), 1 << 16), (np.arange(3000) + 7, 0),
             (np.arange(-120, 120, dtype=np.int8), 1 << 16)]  # int8 keys: a range wider than int8
    two_pass = []  # the reader each case took: the two-pass way for keys in a small range
    real = loading._read_in_range
    monkeypatch.setattr(loading, "_read_in_range", lambda *a: two_pass.append(1) or real(*a))
    for entities, min_span in cases:
        monkeypatch.setattr(budget, "DENSE_MIN_SPAN", min_span)
        ent = rng.choice(entities, 5000)
        elem = rng.integers(-50, 200, 5000)
        path = tmp_path / "e.parquet"
        pl.DataFrame({"e": ent, "x": elem}).write_parquet(path)
        monkeypatch.setattr(loading, "BATCH_ROWS", 777)
        got, _ = loading.load_membership(path, EventSpec(entity="e", element="x"))
        truth: dict[int, set[int]] = {}
        for a, b in zip(ent.tolist(), elem.tolist()):
            truth.setdefault(a, set()).add(b)
        assert got.keys.to_list() == sorted(truth)
        for i, key in enumerate(got.keys.to_list()):
            assert got.elements[got.offsets[i]:got.offsets[i + 1]].tolist() == sorted(truth[key])
        span = int(ent.max()) - int(ent.min()) + 1  # the rule of lshjob/ingest/loading.py's docstring
        assert len(two_pass) == (span <= max(5000 // 4, min_span)), (span, min_span)
        two_pass.clear()


def test_events_without_a_counted_slot_are_reported_not_written():
    # Algebra: key values outside the counted range, or counted zero times, have no slot;
    # the two-pass reader must count them as misplaced (the input changed between passes)
    # and write nothing outside the slots.
    from lshjob.ingest.grouping import place_codes as _place

    slots = np.array([0, -1, 2], dtype=np.int64)  # key 10 owns slots 0-1, key 12 slot 2
    out = np.full(3, -7, dtype=np.int64)
    values = np.array([10, 11, 12, 9, 13, 10], dtype=np.int64)
    codes = np.array([100, 101, 102, 103, 104, 105], dtype=np.int64)
    missed = _place(slots, values, np.int64(10), np.int64(12), codes, np.empty(0), out, np.empty(0), 2)
    assert missed == 3  # 11 (not counted), 9 and 13 (outside the range)
    assert sorted(out.tolist()) == [100, 102, 105]
    assert slots.tolist() == [2, -1, 3]


def test_integer_keys_in_a_small_range_need_8_bytes_an_event(tmp_path):
    # Arithmetic of the two-pass reader (lshjob/ingest/loading.py docstring): 8 bytes per event plus
    # 8 per value of the key range; a budget one byte short is refused before reading.
    from lshjob import ParameterError
    from lshjob.ingest.loading import load_membership

    path = tmp_path / "loans.parquet"
    pl.DataFrame({"patron": np.arange(1000) % 300 + 5000, "title": np.arange(1000)}).write_parquet(path)
    need = 1000 * 8 + 300 * 8
    with pytest.raises(ParameterError, match=r"\(8 bytes an event\)"):
        load_membership(path, EventSpec(entity="patron", element="title"), memory=need - 1)
    sets, _ = load_membership(path, EventSpec(entity="patron", element="title"), memory=need)
    assert sets.size == 300 and sets.keys[0] == 5000


def test_the_two_pass_reader_gives_the_same_sets_on_one_thread_and_on_several(tmp_path):
    # Oracle: the one-thread result. Threads share key values by their low bits; every key
    # must still be counted and placed (three threads where the machine has them: a count
    # that is not a power of two).
    import numba

    from lshjob.ingest.loading import load_membership

    rng = np.random.default_rng(12)
    path = tmp_path / "loans.parquet"
    pl.DataFrame({"patron": rng.integers(0, 500, 20_000), "title": rng.integers(0, 900, 20_000)}).write_parquet(path)
    spec = EventSpec(entity="patron", element="title")
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one, _ = load_membership(path, spec)
        numba.set_num_threads(min(3, numba.config.NUMBA_NUM_THREADS))
        many, _ = load_membership(path, spec)
    finally:
        numba.set_num_threads(before)
    assert many.keys.to_list() == one.keys.to_list()
    assert np.array_equal(many.offsets, one.offsets) and np.array_equal(many.elements, one.elements)


def test_batches_are_cut_where_the_row_groups_end_and_lose_no_row(tmp_path, monkeypatch):
    # Oracle: the file itself. Row groups of 100 rows and batches of 1000 rows: every piece
    # must hold each column in one chunk (so to_numpy is a view, not a copy), and the pieces
    # together must be the file's rows (each once), and the sets loaded from them the sets
    # of a Python dict.
    import lshjob.ingest.loading as loading

    rng = np.random.default_rng(8)
    events = pl.DataFrame({"patron": rng.integers(0, 400, 5000), "title": rng.integers(0, 90, 5000)})
    path = tmp_path / "loans.parquet"
    events.write_parquet(path, row_group_size=100)
    monkeypatch.setattr(loading, "BATCH_ROWS", 1000)
    pieces = list(loading.batches(pl.scan_parquet(path), ["patron", "title"]))
    assert len(pieces) > 5000 // 1000  # cut within batches
    for piece in pieces:
        assert piece["patron"].n_chunks() == 1 and piece["title"].n_chunks() == 1
        assert not piece["patron"].to_numpy().flags.owndata  # a view of polars' buffer
    together = pl.concat(pieces).sort("patron", "title")
    assert together.equals(events.sort("patron", "title"))
    sets, _ = loading.load_membership(path, EventSpec(entity="patron", element="title"))
    truth: dict[int, set[int]] = {}
    for a, b in events.iter_rows():
        truth.setdefault(a, set()).add(b)
    assert sets.keys.to_list() == sorted(truth)
    assert all(sets.elements[sets.offsets[i]:sets.offsets[i + 1]].tolist() == sorted(truth[key])
               for i, key in enumerate(sets.keys.to_list()))


@pytest.mark.parametrize("patrons", ["dense", "sparse", "text"])
def test_a_key_the_first_pass_did_not_see_is_refused(tmp_path, monkeypatch, patrons):
    # As when a file changes between the loader's passes: the read pass meets an entity key
    # that the first pass (the distinct keys) did not list. It must be refused, not grouped
    # under a neighbouring key or counted past the end of the keys.
    import lshjob.ingest.loading as loading
    from lshjob.errors import InputError
    from lshjob.runtime import budget

    key, unseen = {"dense": (np.arange(300) * 5, 7), "sparse": (np.arange(300) * 10**9, 5),
                   "text": ([f"P{i:04d}" for i in range(300)], "P9999")}[patrons]
    path = tmp_path / "loans.parquet"
    pl.DataFrame({"patron": key, "title": np.arange(300) % 7}).write_parquet(path)
    monkeypatch.setattr(budget, "DENSE_MIN_SPAN", 0)  # the one-pass reader, whose first pass lists the keys
    real = loading.batches

    def changed(frame, columns):
        for batch in real(frame, columns):
            if "element" in columns:  # the read pass, not the first
                batch = batch.with_columns(entity=pl.when(pl.int_range(pl.len()) == 3).then(pl.lit(unseen))
                                           .otherwise(pl.col("entity")))
            yield batch

    monkeypatch.setattr(loading, "batches", changed)
    with pytest.raises(InputError, match="changed while being read"):
        loading.load_membership(path, EventSpec(entity="patron", element="title"))
