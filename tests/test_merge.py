"""lshjob merge on empty and mismatched selections: a window with no rows, files without rows,
keys a file lacks or types that differ. Refusals are one line, exit 2, nothing written; a file
without rows among others is folded (it adds nothing)."""

import subprocess
import sys

import numpy as np
import polars as pl
import pytest

from lshjob import EventSpec
from lshjob.errors import InputError, ParameterError
from lshjob.jobs.sign import merge_files, sign_file
from lshjob.sign.signatures import (
    SignatureParams,
    merge_signatures,
    read_signatures,
    signature_array,
    signature_column,
    write_signatures,
)

PARAMS = SignatureParams(perms=16, seed=3)
MONTHLY = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month")


@pytest.fixture(scope="module")
def files(tmp_path_factory, demo_events):
    """Monthly signatures of the demo loans (periods 2026-01-01 to 2026-12-01), the same
    patrons signed whole, and a monthly file without rows."""
    folder = tmp_path_factory.mktemp("merge")
    src = folder / "loans.parquet"
    demo_events[0].write_parquet(src)
    sign_file(src, folder / "monthly.parquet", MONTHLY, PARAMS)
    sign_file(src, folder / "whole.parquet", EventSpec(entity="patron", element="title"), PARAMS)
    table, meta = read_signatures(folder / "monthly.parquet")
    write_signatures(table.clear(), folder / "empty.parquet", {k: v for k, v in meta.items() if k != "path"})
    return folder


def _outputs(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith((".", "out")))


@pytest.mark.parametrize("parts", [1, 3])
def test_a_window_without_rows_is_refused_naming_the_periods_held(files, parts):
    # Oracle: the periods the demo generator writes (months of 2026: first 2026-01-01, last
    # 2026-12-01, read back here by polars); nothing may be written, in one part or in ranges.
    periods = pl.read_parquet(files / "monthly.parquet")["period"]
    assert (str(periods.min()), str(periods.max())) == ("2026-01-01", "2026-12-01")
    with pytest.raises(InputError) as caught:
        merge_files([files / "monthly.parquet"], files / "out.parquet", since="2027-01-01", until="2027-02-01",
                    parts=parts)
    assert str(caught.value) == (f"--since 2027-01-01 --until 2027-02-01 selects no rows; periods in "
                                 f"{files / 'monthly.parquet'} run from 2026-01-01 to 2026-12-01")
    assert _outputs(files) == []


def test_since_after_until_is_a_bad_option_before_any_file_is_read(files):
    # Oracle: the calendar (May comes after February). The file named does not exist: the
    # window is refused before it would be opened.
    with pytest.raises(ParameterError, match="--since 2026-05-01 is after --until 2026-02-01"):
        merge_files([files / "absent.parquet"], files / "out.parquet", since="2026-05-01", until="2026-02-01")


def test_the_command_exits_2_with_one_line_for_since_after_until(files):
    # Oracle: the exit codes of the command line (2: bad option) and its one-line errors.
    result = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "merge", str(files / "monthly.parquet"),
                             "--since", "2026-05-01", "--until", "2026-02-01", "--out", str(files / "out.parquet")],
                            capture_output=True, text=True)
    assert result.returncode == 2
    assert result.stderr.strip().splitlines() == [
        "error: --since 2026-05-01 is after --until 2026-02-01: the window holds no period"]
    assert _outputs(files) == []


def test_a_file_without_rows_is_folded_and_all_empty_is_refused(files):
    # Reference: the merge of the non-empty files alone (merging itself is checked against
    # signing the union in test_signatures.py). An empty file, or one whose rows all lie outside
    # the window, adds nothing; only empty inputs with nothing else are an error.
    out, ref = files / "out.parquet", files / "out-ref.parquet"
    merge_files([files / "monthly.parquet"], ref, since="2026-03-01", until="2026-04-30")
    for parts in (1, 2):
        merge_files([files / "empty.parquet", files / "monthly.parquet", files / "empty.parquet"], out,
                    since="2026-03-01", until="2026-04-30", parts=parts)
        assert pl.read_parquet(out).equals(pl.read_parquet(ref))
    whole = merge_files([files / "empty.parquet", files / "monthly.parquet"], out)
    assert whole["rows_out"] == pl.read_parquet(files / "monthly.parquet")["entity"].n_unique()
    out.unlink()
    ref.unlink()
    with pytest.raises(InputError, match="empty.parquet: no signature rows; nothing to merge"):
        merge_files([files / "empty.parquet"], out)
    with pytest.raises(InputError, match="--until 2026-02-01 selects no rows; .*empty.parquet hold no rows"):
        merge_files([files / "empty.parquet"] * 2, out, until="2026-02-01")
    assert _outputs(files) == []


def test_merging_tables_without_rows_keeps_k_and_the_types():
    # Oracle: the table contract (signature List(UInt64) of length k, set_size UInt32): with no
    # row at all the result has none, typed as the inputs; with one table empty the others'
    # rows come out as they go in (one row per key: the minimum of one row is that row).
    rng = np.random.default_rng(5)
    matrix = rng.integers(0, 2**63, (3, 8), dtype=np.uint64)
    table = pl.DataFrame({"entity": [4, 2, 9]}).with_columns(signature_column(matrix))
    meta = {"scheme": "kperm", "k": 8}
    empty, _ = merge_signatures([(table.clear(), meta), (table.clear(), meta)], ["entity"])
    assert empty.height == 0 and empty.schema == {"entity": pl.Int64, "signature": pl.List(pl.UInt64),
                                                  "set_size": pl.UInt32}
    assert signature_array(empty, 8).shape == (0, 8)
    one, _ = merge_signatures([(table.clear(), meta), (table, meta)], ["entity"])
    assert one["entity"].to_list() == [2, 4, 9]
    assert np.array_equal(signature_array(one), matrix[[1, 0, 2]])


def test_keys_a_file_lacks_or_of_another_type_are_refused_in_one_line(files, tmp_path):
    # Oracle: the files' own key columns (metadata 'keys') and types, as polars reads them.
    whole = files / "whole.parquet"
    with pytest.raises(InputError, match=r"whole.parquet: --keep names segment, not a key column of this file; "
                                         r"its key columns are entity$"):
        merge_files([files / "monthly.parquet", whole], tmp_path / "out.parquet", keep=["entity", "segment"])
    with pytest.raises(InputError, match="--keep names set_size, not a key column"):
        merge_files([files / "monthly.parquet"], tmp_path / "out.parquet", keep=["entity", "set_size"])
    with pytest.raises(ParameterError, match="whole.parquet: --since/--until need a 'period' column"):
        merge_files([files / "monthly.parquet", whole], tmp_path / "out.parquet", since="2026-01-01")
    table, meta = read_signatures(whole)
    numbered = tmp_path / "numbered.parquet"
    write_signatures(table.with_columns(pl.int_range(pl.len()).alias("entity")), numbered,
                     {k: v for k, v in meta.items() if k != "path"})
    with pytest.raises(InputError, match="numbered.parquet: key column 'entity' is Int64, but in .*whole.parquet "
                                         "it is String"):
        merge_files([whole, numbered], tmp_path / "out.parquet")
    with pytest.raises(InputError, match="loans.parquet: not an lshjob signature file"):
        merge_files([whole, files / "loans.parquet"], tmp_path / "out.parquet")
    assert list(tmp_path.iterdir()) == [numbered]
    # Files of different key columns fold into the columns kept.
    summary = merge_files([files / "monthly.parquet", whole], tmp_path / "out.parquet")
    assert summary["rows_out"] == table.height
    # A key named twice, or an empty name (--keep "entity,"), is the key once.
    assert merge_files([files / "monthly.parquet", whole], tmp_path / "again.parquet", keep=["entity", "", "entity"])
    assert pl.read_parquet(tmp_path / "again.parquet").equals(pl.read_parquet(tmp_path / "out.parquet"))


def test_a_signature_file_without_rows_is_refused_as_a_planning_sample(files):
    # Oracle: the planner's own minimum (two rows, for one pair), and the file named.
    from lshjob.jobs.sign import plan_banding

    with pytest.raises(InputError, match=r"empty.parquet: the sample needs at least 2 signature rows; got 0$"):
        plan_banding(0.5, sample=files / "empty.parquet")


def test_periods_of_different_units_are_not_kept_apart_together(files, tmp_path):
    # Oracle: the files' metadata (period_unit month and week). A month and the week that
    # starts on its first day share a period date but not a meaning; folded by entity they
    # merge as usual.
    weekly = tmp_path / "weekly.parquet"
    sign_file(files / "loans.parquet", weekly, EventSpec(entity="patron", element="title", time="borrowed_at",
                                                         period="week"), PARAMS)
    with pytest.raises(InputError, match=r"weekly.parquet: periods by week, but .*monthly.parquet has periods by "
                                         r"month; --keep period needs files of one period unit"):
        merge_files([files / "monthly.parquet", weekly], tmp_path / "out.parquet", keep=["entity", "period"])
    assert merge_files([files / "monthly.parquet", weekly], tmp_path / "out.parquet")["rows_out"] > 900
    assert read_signatures(tmp_path / "out.parquet")[1]["period_unit"] is None  # no period column left
    merge_files([files / "monthly.parquet"], tmp_path / "kept.parquet", keep=["entity", "period"])
    assert read_signatures(tmp_path / "kept.parquet")[1]["period_unit"] == "month"
