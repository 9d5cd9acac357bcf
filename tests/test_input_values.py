"""Values a nightly job meets inside otherwise well-formed inputs: counts that are not
counts, nested NDJSON values, hidden files in a folder, configuration files in another
encoding. Each ends in a result or one line naming the file, column, value and place, and
nothing written; both ingest paths are checked (the streaming loader for one set per entity,
polars' group-by with ``--segment``)."""

from __future__ import annotations

import os
import subprocess
import sys

import polars as pl
import pytest

from lshjob import EventSpec, InputError, ParameterError, load_sets, sign_file
from lshjob.ingest.loading import load_membership
from lshjob.jobs.config import load_run_config

SPEC = ["--entity", "patron", "--element", "title"]


def lshjob(*args, cwd):
    """``lshjob args`` in a child process, through the console script's entry point."""
    script = "import sys\nimport lshjob.cli.app\nsys.argv = ['lshjob', *sys.argv[1:]]\nlshjob.cli.app.entry_point()\n"
    env = dict(os.environ, XDG_STATE_HOME=str(cwd / "state"))
    return subprocess.run([sys.executable, "-c", script, *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)


def one_error_line(done) -> str:
    """Exit 2 and exactly one stderr line starting 'error: '; returns it."""
    assert done.returncode == 2, done.stderr
    assert done.stderr.startswith("error: ") and done.stderr.count("\n") == 1, done.stderr
    return done.stderr.strip()


def test_a_config_file_not_in_utf8_is_named_with_the_byte_offset(tmp_path):
    # Oracle: the byte written at a known offset (0xe8, Latin-1 for e-grave, at offset 10).
    (tmp_path / "job.toml").write_bytes(b"# biblioth\xe8que\nevents = \"ev.parquet\"\n")
    done = lshjob("run", "--config", "job.toml", cwd=tmp_path)
    assert one_error_line(done) == ("error: job.toml: not UTF-8 text: byte 0xe8 at offset 10 (line 1); "
                                    "save the file as UTF-8")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["job.toml"]


def test_a_config_file_with_a_byte_order_mark_and_memory_in_bytes_is_read(tmp_path):
    # Oracle: the same keys written without the mark, and --memory's own parser for bytes.
    body = 'entity = "patron"\nmemory = 8000000000\n'
    (tmp_path / "plain.toml").write_text(body, encoding="utf-8")
    (tmp_path / "marked.toml").write_text(body, encoding="utf-8-sig")
    assert load_run_config(tmp_path / "marked.toml") == load_run_config(tmp_path / "plain.toml") == {
        "entity": "patron", "memory": 8000000000}
    (tmp_path / "bad.toml").write_text("memory = 1.5\n")
    with pytest.raises(ParameterError, match="expected text or a whole number"):
        load_run_config(tmp_path / "bad.toml")


def test_a_folder_skips_hidden_and_underscore_files_but_a_named_one_is_read(tmp_path):
    # Oracle: the folder's one visible file read alone; the hidden files are empty (unreadable)
    # so reading any of them would stop the run.
    folder = tmp_path / "exp"
    folder.mkdir()
    pl.DataFrame({"patron": ["ann", "ann", "bob"], "title": ["t1", "t2", "t1"]}).write_parquet(folder / "a.parquet")
    for name in (".hidden.parquet", "_SUCCESS.parquet", ".part-0.tmp.parquet"):
        (folder / name).write_bytes(b"")
    alone, _ = load_sets(folder / "a.parquet", EventSpec(entity="patron", element="title"))
    from_folder, report = load_sets(folder, EventSpec(entity="patron", element="title"))
    assert from_folder.equals(alone) and report.files == [str(folder / "a.parquet")]
    with pytest.raises(InputError, match=r"\.hidden\.parquet"):
        load_sets(folder / ".hidden.parquet", EventSpec(entity="patron", element="title"))


def test_all_null_elements_dropped_is_named_as_the_cause(tmp_path):
    # Oracle: the file holds only null elements, so --on-null drop leaves nothing whatever
    # --min-count is; the message must say so, for sign (both paths) and run alike.
    from lshjob.jobs.run import RunOptions, run_job

    path = tmp_path / "loans.parquet"
    pl.DataFrame({"patron": ["ann", "bob"], "title": pl.Series([None, None], dtype=pl.String),
                  "branch": ["Harbour"] * 2}).write_parquet(path)
    expected = f"{path}: every row had a null key and was dropped (--on-null drop); nothing to sign"
    for segment in (None, "branch"):
        spec = EventSpec(entity="patron", element="title", segment=segment, on_null="drop")
        with pytest.raises(InputError) as err:
            sign_file(path, tmp_path / "s.parquet", spec)
        assert str(err.value) == expected
    with pytest.raises(InputError) as err:
        run_job(path, EventSpec(entity="patron", element="title", on_null="drop"), RunOptions(threshold=0.5),
                tmp_path / "index")
    assert str(err.value) == expected
    assert sorted(p.name for p in tmp_path.iterdir()) == ["loans.parquet"]


def test_one_entity_warns_once_that_there_is_no_pair(tmp_path):
    # Oracle: with one entity there is no other entity, so no pair and no --top-k to cut.
    from lshjob.jobs.run import RunOptions, run_job

    path = tmp_path / "loans.parquet"
    pl.DataFrame({"patron": ["ann"] * 3, "title": ["t1", "t2", "t3"]}).write_parquet(path)
    manifest = run_job(path, EventSpec(entity="patron", element="title"), RunOptions(threshold=0.5),
                       tmp_path / "index")
    assert manifest["warnings"] == ["only 1 entity: the index is empty"]
    assert pl.read_parquet(tmp_path / "index" / "neighbours.parquet").height == 0


def count_table(loans) -> pl.DataFrame:
    return pl.DataFrame({"patron": ["ann", "ann", "bob", "bob", "cy"], "title": ["t1", "t2", "t1", "t3", "t9"],
                         "branch": ["Harbour"] * 5, "loans": loans})


def both_paths(**kwargs):
    """The streaming loader (one set per entity) and polars' group-by (with a segment)."""
    return [EventSpec(entity="patron", element="title", count="loans", **kwargs),
            EventSpec(entity="patron", element="title", count="loans", segment="branch", **kwargs)]


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
@pytest.mark.parametrize("value, shown", [(-1, "-1"), (float("nan"), "nan"), (float("inf"), "inf")])
def test_a_count_that_is_not_a_count_is_refused_with_its_place(tmp_path, fmt, value, shown):
    # Oracle: the planted value at the third data row (Parquet row 3, CSV line 4: the
    # header is line 1); a count is a finite number >= 0 whatever --on-null says.
    loans = [1.0, 2.0, value, 1.0, 1.0]
    path = tmp_path / f"loans.{fmt}"
    getattr(count_table(loans), f"write_{fmt}")(path)
    place = "row 3" if fmt == "parquet" else "line 4"
    for spec in both_paths() + both_paths(on_null="drop"):
        with pytest.raises(InputError) as err:
            sign_file(path, tmp_path / "out" / "s.parquet", spec)
        text = str(err.value)
        assert text.startswith(f"{path}: column 'loans' (--count) value {shown}") and f"at {place}" in text, text
        assert "expected a finite number >= 0" in text and "\n" not in text
        assert not (tmp_path / "out").exists()


def test_a_null_count_is_refused_or_dropped_like_a_null_key(tmp_path):
    # Oracle: by hand, the table without bob's null-count row: ann {t1, t2}, bob {t3}, cy {t9}.
    path = tmp_path / "loans.parquet"
    count_table([1, 1, None, 1, 1]).write_parquet(path)
    for spec in both_paths():
        with pytest.raises(InputError, match=r"column 'loans' has 1 null value\(s\) \(first at row 3\)"):
            load_sets(path, spec)
    for spec in both_paths(on_null="drop"):
        sets, report = load_sets(path, spec)
        assert sorted(sets.select("entity", "element").rows()) == [("ann", "t1"), ("ann", "t2"), ("bob", "t3"),
                                                                  ("cy", "t9")]
        assert report.null_rows_dropped == 1
    membership, report = load_membership(path, both_paths(on_null="drop")[0])
    assert membership.set_sizes.tolist() == [2, 1, 1] and report.null_rows_dropped == 1


def test_a_zero_count_is_seen_zero_times(tmp_path):
    # Oracle: the sums of counts per (patron, title) by hand, against --min-count 1 and 2:
    # ann t1 = 1 + 0 (twice), t2 = 0; bob t1 = 2, t3 = 0; cy t9 = 1.
    frame = pl.DataFrame({"patron": ["ann", "ann", "ann", "bob", "bob", "cy"],
                          "title": ["t1", "t1", "t2", "t1", "t3", "t9"], "branch": ["Harbour"] * 6,
                          "loans": [1, 0, 0, 2, 0, 1]})
    path = tmp_path / "loans.parquet"
    frame.write_parquet(path)
    for min_count, expected in ((1, [("ann", "t1"), ("bob", "t1"), ("cy", "t9")]), (2, [("bob", "t1")])):
        for spec in both_paths(min_count=min_count):
            sets, _ = load_sets(path, spec)
            assert sorted(sets.select("entity", "element").rows()) == expected
        membership, _ = load_membership(path, both_paths(min_count=min_count)[0])
        assert membership.set_sizes.tolist() == [1] * len(expected)


def test_cli_refuses_a_negative_count_and_the_same_column_twice(tmp_path):
    # Oracle: the planted -1 at Parquet row 3, and the one-column-per-role rule; exit 2,
    # one line, nothing written.
    count_table([1, 2, -1, 1, 1]).write_parquet(tmp_path / "loans.parquet")
    done = lshjob("run", "loans.parquet", *SPEC, "--count", "loans", "--threshold", "0.5", "--out", "index",
                  cwd=tmp_path)
    assert "loans.parquet: column 'loans' (--count) value -1 at row 3 is not a count" in one_error_line(done)
    done = lshjob("sign", "loans.parquet", "--entity", "patron", "--element", "title", "--segment", "patron",
                  "--out", "s.parquet", cwd=tmp_path)
    assert "--entity and --segment name the same column 'patron'" in one_error_line(done)
    done = lshjob("sign", "loans.parquet", *SPEC, "--min-count", "nan", "--out", "s.parquet", cwd=tmp_path)
    assert one_error_line(done) == "error: --min-count must be a finite number > 0; got nan"
    assert sorted(p.name for p in tmp_path.iterdir() if p.name != "state") == ["loans.parquet"]


@pytest.mark.parametrize("value, kind", [('{"id": 1}', "an object"), ("[1, 2]", "an array")])
def test_a_nested_ndjson_key_is_refused_with_its_line(tmp_path, value, kind):
    # Oracle: the nested value planted on line 4 of the file (a blank line 2 counts as a
    # line, not a row); text that only looks nested ("[Untitled]", "{draft") is a key.
    path = tmp_path / "loans.ndjson"
    path.write_text('{"patron": "ann", "title": "[Untitled]", "branch": "Harbour"}\n\n'
                    '{"patron": "bob", "title": "{draft", "branch": "Harbour"}\n'
                    f'{{"patron": "cy", "title": {value}, "branch": "Harbour"}}\n')
    for spec in (EventSpec(entity="patron", element="title"), EventSpec(entity="patron", element="title",
                                                                        segment="branch")):
        with pytest.raises(InputError) as err:
            sign_file(path, tmp_path / "out" / "s.parquet", spec)
        assert str(err.value) == (f"{path}: line 4: column 'title' (--element) holds {kind}, {value}; "
                                  "keys must be text or integers")
        assert not (tmp_path / "out").exists()
    path.write_text("\n".join(path.read_text().splitlines()[:3]) + "\n")
    sets, _ = load_sets(path, EventSpec(entity="patron", element="title"))
    assert sorted(sets.select("entity", "element").rows()) == [("ann", "[Untitled]"), ("bob", "{draft")]


@pytest.mark.parametrize("fmt", ["csv", "ndjson"])
def test_a_text_file_not_in_utf8_is_named_with_its_line(tmp_path, fmt):
    # Oracle: the Latin-1 byte 0xe8 (e-grave) planted on line 3, read through both paths.
    path = tmp_path / f"loans.{fmt}"
    if fmt == "csv":
        path.write_bytes(b"patron,title,branch\nann,t1,Harbour\nbob,biblioth\xe8que,Harbour\ncy,t9,Harbour\n")
    else:
        path.write_bytes(b'{"patron": "ann", "title": "t1", "branch": "Harbour"}\n\n'
                         b'{"patron": "bob", "title": "biblioth\xe8que", "branch": "Harbour"}\n')
    for spec in (EventSpec(entity="patron", element="title"),
                 EventSpec(entity="patron", element="title", segment="branch")):
        with pytest.raises(InputError) as err:
            sign_file(path, tmp_path / "out" / "s.parquet", spec)
        assert str(err.value) == (f"{path}: cannot be read as {fmt}: not UTF-8 text: byte 0xe8 at line 3; "
                                  "save the file as UTF-8")
        assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_a_bad_count_in_the_second_file_names_that_file(tmp_path, fmt):
    # Oracle: the planted -2 is on the second data row of b.{fmt} (row 2, or CSV line 3).
    folder = tmp_path / "in"
    folder.mkdir()
    getattr(count_table([1, 1, 1, 1, 1]), f"write_{fmt}")(folder / f"a.{fmt}")
    getattr(count_table([1, -2, 1, 1, 1]), f"write_{fmt}")(folder / f"b.{fmt}")
    place = "row 2" if fmt == "parquet" else "line 3"
    loader, grouped = both_paths()
    for load in (lambda: load_membership(folder, loader), lambda: load_sets(folder, grouped)):
        with pytest.raises(InputError) as err:
            load()
        assert str(err.value).startswith(f"{folder / f'b.{fmt}'}: column 'loans' (--count) value -2")
        assert f"at {place}" in str(err.value)
