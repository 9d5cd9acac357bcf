"""Statistics from Parquet footers (lshjob/ingest/parquet_footer.py, DuckDB's parquet_metadata()) against
reading the data."""

import duckdb
import numpy as np
import polars as pl
import pytest

from lshjob import EventSpec
from lshjob.ingest import spec as ingest
from lshjob.ingest.parquet_footer import footer_stats


def _files(tmp_path, n_files=3, entity_type=pl.Int64, with_nulls=False):
    rng = np.random.default_rng(7)
    paths, frames = [], []
    for i in range(n_files):
        n = 5000 + 1000 * i
        frame = pl.DataFrame({
            "patron": pl.Series(rng.integers(-40_000, 90_000, n)).cast(entity_type),
            "title": pl.Series([f"T{v}" for v in rng.integers(0, 500, n)]),
            "branch": pl.Series(rng.choice(["Harbour", "Riverside"], n)),
        })
        if with_nulls:
            frame = frame.with_columns(pl.when(pl.int_range(pl.len()) % 97 == 3).then(None)
                                       .otherwise(pl.col("title")).alias("title"))
        paths.append(tmp_path / f"loans-{i}.parquet")
        frame.write_parquet(paths[-1], row_group_size=1500)  # several row groups a file
        frames.append(frame)
    return paths, pl.concat(frames)


@pytest.mark.parametrize("entity_type", [pl.Int64, pl.Int32])
@pytest.mark.parametrize("with_nulls", [False, True])
def test_footer_statistics_equal_polars_reading_the_data(tmp_path, entity_type, with_nulls):
    # Reference: polars' own pass over the data (len, null_count, min, max).
    paths, data = _files(tmp_path, entity_type=entity_type, with_nulls=with_nulls)
    found = footer_stats(paths, ["patron", "title"], "patron")
    assert found == {
        "rows": data.height,
        "nulls": {"patron": 0, "title": data["title"].null_count()},
        "min": data["patron"].min(), "max": data["patron"].max(),
    }
    assert with_nulls == (found["nulls"]["title"] > 0)


def test_a_file_written_by_duckdb_reads_alike(tmp_path):
    # Reference: the data itself, written by another Parquet writer (DuckDB's), whose footer
    # polars did not produce.
    path = tmp_path / "duck.parquet"
    duckdb.sql(f"""COPY (SELECT (i * 7919) % 100003 - 5000 AS patron, 'T' || (i % 313) AS title
                        FROM range(300000) t(i)) TO '{path}' (FORMAT parquet, ROW_GROUP_SIZE 50000)""")
    data = pl.read_parquet(path)
    assert footer_stats([path], ["patron", "title"], "patron") == {
        "rows": 300000, "nulls": {"patron": 0, "title": 0},
        "min": data["patron"].min(), "max": data["patron"].max(),
    }


def test_missing_statistics_or_a_broken_footer_give_none(tmp_path):
    # The caller must read the data whenever the footer cannot answer.
    frame = pl.DataFrame({"patron": [1, 2, 3], "title": ["a", "b", "c"]})
    bare = tmp_path / "bare.parquet"
    frame.write_parquet(bare, statistics=False)
    assert footer_stats([bare], ["patron", "title"], "patron") is None
    good = tmp_path / "good.parquet"
    frame.write_parquet(good)
    assert footer_stats([good], ["patron", "missing"], "patron") is None
    broken = tmp_path / "broken.parquet"
    broken.write_bytes(good.read_bytes()[:-20] + b"\x00" * 16 + b"PAR1")
    assert footer_stats([broken], ["patron", "title"], "patron") is None
    short = tmp_path / "short.parquet"
    short.write_bytes(b"PAR1")
    assert footer_stats([good, short], ["patron", "title"], "patron") is None


def test_unsigned_bounds_above_the_signed_range(tmp_path):
    # Reference: the data. Keys past 2**31 (UInt32) and 2**63 (UInt64) read as signed would
    # be negative; the footer's bounds follow the unsigned order.
    for dtype, top in ((pl.UInt32, 2**32 - 1), (pl.UInt64, 2**64 - 1)):
        path = tmp_path / f"{dtype}.parquet"
        data = pl.DataFrame({"patron": pl.Series([5, top, 2**31 + 7, top - 3], dtype=dtype), "title": ["a"] * 4})
        data.write_parquet(path, row_group_size=2)
        found = footer_stats([path], ["patron", "title"], "patron")
        assert (found["min"], found["max"]) == (5, top)


@pytest.mark.parametrize("entity_type", [pl.Int64, pl.UInt32, pl.String])
@pytest.mark.parametrize("with_nulls", [False, True])
def test_the_ingest_report_is_the_same_from_footers_and_from_the_data(tmp_path, monkeypatch, entity_type,
                                                                        with_nulls):
    # Reference: validated_events with the footers ignored (polars reads the data).
    paths, _ = _files(tmp_path, entity_type=pl.Int64, with_nulls=with_nulls)
    if entity_type != pl.Int64:
        for p in paths:
            pl.read_parquet(p).with_columns(pl.col("patron").abs().cast(entity_type)).write_parquet(p)
    spec = EventSpec(entity="patron", element="title", segment="branch", on_null="drop")
    _, fast, _ = ingest.validated_events(str(tmp_path / "*.parquet"), spec)
    used = ingest.stats_from_footers(sorted(tmp_path.glob("*.parquet")), ["patron", "title", "branch"], "patron",
                                      pl.read_parquet_schema(paths[0])["patron"])
    assert (used is not None) == (not with_nulls)  # footers answered
    monkeypatch.setattr(ingest, "stats_from_footers", lambda *a: None)
    _, slow, _ = ingest.validated_events(str(tmp_path / "*.parquet"), spec)
    assert fast == slow and fast.entity_range == slow.entity_range
    assert (fast.entity_range is None) == (entity_type == pl.String)


def test_a_footer_that_hides_nulls_is_caught_while_reading(tmp_path, monkeypatch):
    # A writer whose statistics say "no null" while the data holds some: the loader checks
    # every batch it reads and stops with a message instead of signing garbage.
    from lshjob.errors import InputError
    from lshjob.ingest.loading import load_membership

    paths, _ = _files(tmp_path, n_files=1, with_nulls=True)
    real = ingest.stats_from_footers

    def lying(paths, key_names, entity, entity_type):
        stats = pl.read_parquet(paths[0]).select(pl.len().alias("rows"), pl.col("patron").min().alias("__entity_min"),
                                                 pl.col("patron").max().alias("__entity_max"))
        return stats.with_columns(*[pl.lit(0).alias(n) for n in key_names], pl.lit(0).alias("__any_null"))

    assert real(paths, ["patron", "title"], "patron", pl.Int64) is None  # the honest footer has nulls
    monkeypatch.setattr(ingest, "stats_from_footers", lying)
    with pytest.raises(InputError, match="the element column holds null values"):
        load_membership(paths[0], EventSpec(entity="patron", element="title"))
