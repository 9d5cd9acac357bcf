"""Inputs a nightly job meets: each ends in a result or a one-line InputError naming the
file (and the column, value or line), through both ingest paths: the streaming loader
(``sign_file`` with one set per entity) and polars' group-by (``--segment``)."""

import json
import subprocess
import sys
import unicodedata

import numpy as np
import polars as pl
import pytest

from lshjob import EventSpec, InputError, load_sets, sign_file
from lshjob.ingest.loading import load_membership

SPEC = EventSpec(entity="patron", element="title")
SEGMENTED = EventSpec(entity="patron", element="title", segment="branch")


def events(n=60, seed=0):
    """Patrons 0..9, titles 0..19, one branch: a small integer loan table."""
    rng = np.random.default_rng(seed)
    return pl.DataFrame({"patron": rng.integers(0, 10, n), "title": rng.integers(0, 20, n), "branch": ["Harbour"] * n})


def refused(tmp_path, source, *fragments, specs=(SPEC, SEGMENTED)):
    """Both paths refuse ``source`` with one InputError line holding every fragment, and
    write nothing."""
    for spec in specs:
        out = tmp_path / "out" / "sig.parquet"
        with pytest.raises(InputError) as err:
            sign_file(source, out, spec)
        text = str(err.value)
        assert "\n" not in text
        for fragment in fragments:
            assert fragment in text, (spec, text)
        assert not out.parent.exists() or not any(out.parent.iterdir())


def signed(source, spec=SPEC, tmp=None) -> dict:
    """{entity: signature} of ``source``, signed by the streaming loader."""
    out = tmp / "sig.parquet"
    sign_file(source, out, spec)
    table = pl.read_parquet(out)
    return {tuple(r[:-2]) if len(r) > 3 else r[0]: r[-2] for r in table.rows()}


def oracle_sets(frame: pl.DataFrame, entity="patron", element="title") -> dict:
    """Oracle: Python sets of the elements' decimal text per entity."""
    sets = {}
    for e, t in frame.select(entity, element).rows():
        sets.setdefault(e, set()).add(str(t))
    return sets


# 1. schema drift ----------------------------------------------------------------------

@pytest.mark.parametrize("fmt", ["parquet", "csv", "ndjson"])
def test_a_file_that_gained_a_column_reads_like_the_rest(tmp_path, fmt):
    frame = events()
    folder = tmp_path / "in"
    folder.mkdir()
    getattr(frame[:30], f"write_{fmt}")(folder / f"a.{fmt}")
    getattr(frame[30:].with_columns(pl.lit(7).alias("renewals")), f"write_{fmt}")(folder / f"b.{fmt}")
    sets, _ = load_sets(folder, SPEC)
    got = {e: {str(t) for t in g["element"]} for (e,), g in sets.group_by("entity")}
    assert got == oracle_sets(frame)  # oracle: Python sets over the table as written
    members, _ = load_membership(folder, SPEC)
    assert members.size == len(got)


@pytest.mark.parametrize("fmt", ["parquet", "csv", "ndjson"])
def test_a_file_lacking_a_named_column_is_named(tmp_path, fmt):
    folder = tmp_path / "in"
    folder.mkdir()
    getattr(events()[:30], f"write_{fmt}")(folder / f"a.{fmt}")
    getattr(events()[30:].rename({"title": "book"}), f"write_{fmt}")(folder / f"b.{fmt}")
    refused(tmp_path, folder, f"b.{fmt}", "'title'", "not found", "book")


def test_keys_of_different_types_across_files_are_read_as_text(tmp_path):
    # Decision: integers in one file and text in another -> text in all; an integer
    # element hashes like its decimal text, so the signatures equal those of all-integers.
    frame = events()
    folder = tmp_path / "mixed"
    folder.mkdir()
    frame[:30].write_parquet(folder / "a.parquet")
    frame[30:].with_columns(pl.col("title").cast(pl.String)).write_parquet(folder / "b.parquet")
    whole = tmp_path / "whole.parquet"
    frame.write_parquet(whole)
    (tmp_path / "m").mkdir()
    (tmp_path / "w").mkdir()
    assert signed(folder, tmp=tmp_path / "m") == signed(whole, tmp=tmp_path / "w")


def test_a_time_column_of_two_types_names_both_files(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    events()[:30].with_columns(at=pl.lit("2026-01-02")).write_parquet(folder / "a.parquet")
    events()[30:].with_columns(at=pl.lit(3)).write_parquet(folder / "b.parquet")
    spec = EventSpec(entity="patron", element="title", time="at", period="month")
    refused(tmp_path, folder, "a.parquet", "b.parquet", "'at'", "String", "Int", specs=(spec,))


# 2. CSV keys that look numeric, then hold text ----------------------------------------

def test_csv_key_numeric_for_thousands_of_rows_then_text(tmp_path):
    rows = [f"{i % 50},{i % 700}" for i in range(5000)] + ["3,Dune"]
    path = tmp_path / "late.csv"
    path.write_text("patron,title\n" + "\n".join(rows) + "\n")
    sets, _ = load_sets(path, SPEC)
    got = {e: set(g["element"].cast(pl.String)) for (e,), g in sets.group_by("entity")}
    expected = oracle_sets(pl.read_csv(path, infer_schema=False))
    assert {int(k): v for k, v in expected.items()} == got  # oracle: Python sets of the text
    members, _ = load_membership(path, SPEC)
    assert members.size == 50 and members.text_hashes is not None


def test_csv_text_keys_sign_like_parquet_integers(tmp_path):
    # README: integer elements hash like their decimal text. Oracle: the same table as
    # Parquet with Int64 keys; the CSV, whose title column ends in text, is read as text.
    frame = events(400)
    parquet = tmp_path / "ints.parquet"
    frame.write_parquet(parquet)
    csv = tmp_path / "text.csv"
    frame.select("patron", "title").write_csv(csv)
    with open(csv, "a") as f:
        f.write("99,Dune\n")
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    got = signed(csv, tmp=tmp_path / "a")
    expected = signed(parquet, tmp=tmp_path / "b")
    assert got.pop(99) is not None
    assert got == expected


def test_csv_plain_integers_stay_integers_and_padded_ones_stay_text(tmp_path):
    plain = tmp_path / "plain.csv"
    plain.write_text("patron,title\n1,100\n2,-7\n")
    padded = tmp_path / "padded.csv"
    padded.write_text("patron,title\n1,007\n1,7\n")
    sets, _ = load_sets(plain, SPEC)
    assert sets["entity"].dtype == pl.Int64 and sets["element"].dtype == pl.Int64
    sets, _ = load_sets(padded, SPEC)
    assert sorted(sets["element"].to_list()) == ["007", "7"]  # two titles, as written


# 3. ragged CSV ------------------------------------------------------------------------

@pytest.mark.parametrize("line", ["b,Smith, John,H", "b,H"])
def test_a_ragged_csv_line_is_named(tmp_path, line):
    path = tmp_path / "ragged.csv"
    path.write_text('patron,title,branch\na,x,H\n"c","q,r",H\n' + line + "\nd,y,H\n")
    refused(tmp_path, path, "ragged.csv", "line 4")


# 4. corrupt data behind an intact footer ----------------------------------------------

def corrupt_copy(good: bytes) -> bytes:
    """Flip 64 bytes inside the first column chunk's pages (zstd then fails to decode)."""
    for start in range(len(good) // 20, len(good) // 2, 997):
        bad = bytearray(good)
        for i in range(start, start + 64):
            bad[i] ^= 0xA5
        try:
            pl.read_parquet(bytes(bad))
        except pl.exceptions.PolarsError:
            return bytes(bad)
    raise AssertionError("no corruption found that the reader detects")


@pytest.mark.parametrize("text_entity", [True, False])  # polars' group-by / composite keys with --segment
def test_a_corrupt_page_names_the_file_among_several(tmp_path, text_entity):
    rng = np.random.default_rng(1)
    patrons = [f"p{i % 1000}" for i in range(50000)] if text_entity else [i % 1000 for i in range(50000)]
    big = pl.DataFrame({"patron": patrons, "title": rng.integers(0, 10**9, 50000),
                        "branch": ["Harbour"] * 50000})
    folder = tmp_path / "in"
    folder.mkdir()
    big.head(100).write_parquet(folder / "a.parquet")
    big.write_parquet(tmp_path / "good.parquet")
    (folder / "b.parquet").write_bytes(corrupt_copy((tmp_path / "good.parquet").read_bytes()))
    big.tail(100).write_parquet(folder / "c.parquet")
    refused(tmp_path, folder, "b.parquet", "cannot be read")


# 5. unsigned 64-bit keys --------------------------------------------------------------

def test_unsigned_keys_at_and_above_2_63(tmp_path):
    top = [2**63, 2**64 - 1, 5]
    path = tmp_path / "u64.parquet"
    pl.DataFrame({"patron": pl.Series(top * 2, dtype=pl.UInt64),
                  "title": pl.Series([2**63, 2**64 - 1, 3, 2**63, 1, 3], dtype=pl.UInt64),
                  "branch": ["Harbour"] * 6}).write_parquet(path)
    text = tmp_path / "text.parquet"
    pl.read_parquet(path).with_columns(pl.col("title").cast(pl.String)).write_parquet(text)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    got = signed(path, tmp=tmp_path / "a")
    assert sorted(got) == sorted(top)
    # oracle: the same titles as decimal text (README: integers hash like their text)
    assert got == signed(text, tmp=tmp_path / "b")
    sets, _ = load_sets(path, SEGMENTED)
    assert sorted(sets.filter(pl.col("entity") == 2**63)["element"].to_list()) == [2**63]
    assert sorted(sets.filter(pl.col("entity") == 2**64 - 1)["element"].to_list()) == [1, 2**64 - 1]


# 6. other bad files -------------------------------------------------------------------

def test_ndjson_with_a_malformed_line(tmp_path):
    path = tmp_path / "loans.ndjson"
    path.write_text('{"patron":"a","title":"x","branch":"H"}\n{"patron":"b","title":\n{"patron":"c","title":"y"}\n')
    refused(tmp_path, path, "loans.ndjson", "cannot be read as ndjson", "line 2")
    late = tmp_path / "late.ndjson"  # past the lines polars reads for the schema
    late.write_text('{"patron":"a","title":"x","branch":"H"}\n' * 500 + '{"patron":"b",\n')
    refused(tmp_path, late, "late.ndjson", "cannot be read as ndjson", "line 501")


def test_an_empty_file(tmp_path):
    path = tmp_path / "loans.csv"
    path.write_text("")
    refused(tmp_path, path, "loans.csv", "empty")


def test_a_parquet_file_with_zero_rows_among_others(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    frame = events()
    frame.write_parquet(folder / "a.parquet")
    frame.head(0).write_parquet(folder / "b.parquet")
    sets, report = load_sets(folder, SPEC)
    assert report.rows_read == frame.height
    assert {e: {str(t) for t in g["element"]} for (e,), g in sets.group_by("entity")} == oracle_sets(frame)


def test_a_csv_named_parquet_among_parquet_files(tmp_path):
    folder = tmp_path / "in"
    folder.mkdir()
    events().write_parquet(folder / "a.parquet")
    (folder / "b.parquet").write_text("patron,title\n1,2\n")
    refused(tmp_path, folder, "b.parquet", "cannot be read as parquet")


def test_float_and_nested_keys_are_refused_with_their_type(tmp_path):
    floats = tmp_path / "floats.parquet"
    pl.DataFrame({"patron": [1.0, 2.0], "title": [1, 2], "branch": ["H", "H"]}).write_parquet(floats)
    refused(tmp_path, floats, "floats.parquet", "'patron'", "Float64")
    lists = tmp_path / "lists.parquet"
    pl.DataFrame({"patron": [1, 2], "title": [[1], [2]], "branch": ["H", "H"]}).write_parquet(lists)
    refused(tmp_path, lists, "lists.parquet", "'title'", "List")


def test_a_count_that_is_not_a_number_names_the_line(tmp_path):
    path = tmp_path / "counts.csv"
    path.write_text("patron,title,loans\n" + "a,x,1\n" * 200 + "b,y,two\n")
    spec = EventSpec(entity="patron", element="title", count="loans")
    refused(tmp_path, path, "counts.csv", "'loans'", "'two'", "line 202", specs=(spec,))


# 7. Unicode ---------------------------------------------------------------------------

NAMES = ["Zoë", "Ångström"]


def unicode_events(forms) -> pl.DataFrame:
    rows = []
    for i, name in enumerate(NAMES):
        for j, form in enumerate(forms):
            rows.append((unicodedata.normalize(form, name), f"t{i}{j}", unicodedata.normalize(form, name + " Hall")))
    return pl.DataFrame(rows, schema=["patron", "title", "branch"], orient="row")


@pytest.mark.parametrize("spec", [SPEC, SEGMENTED])
def test_nfc_and_nfd_forms_are_one_key(tmp_path, spec):
    mixed = tmp_path / "mixed.parquet"
    unicode_events(["NFC", "NFD"]).write_parquet(mixed)
    nfc_only = tmp_path / "nfc.parquet"
    unicode_events(["NFC", "NFC"]).write_parquet(nfc_only)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    got = signed(mixed, spec, tmp=tmp_path / "a")
    # oracle: the input written in NFC only (Python's unicodedata)
    assert got == signed(nfc_only, spec, tmp=tmp_path / "b")
    assert len(got) == 2
    asis = EventSpec(entity="patron", element="title", segment=spec.segment, unicode="asis")
    (tmp_path / "c").mkdir()
    assert len(signed(mixed, asis, tmp=tmp_path / "c")) == 4


def test_nfc_and_nfd_elements_are_one_element(tmp_path):
    path = tmp_path / "titles.parquet"
    title = "Le Petit Prince — Saint-Exupéry"
    pl.DataFrame({"patron": ["a", "a", "b"], "title": [unicodedata.normalize("NFD", title),
                  unicodedata.normalize("NFC", title), title]}).write_parquet(path)
    members, _ = load_membership(path, SPEC)
    assert members.set_sizes.tolist() == [1, 1]
    assert members.elements.tolist() == [0, 0]
    sets, _ = load_sets(path, SPEC)
    assert sets["element"].to_list() == [unicodedata.normalize("NFC", title)] * 2
    members, _ = load_membership(path, EventSpec(entity="patron", element="title", unicode="asis"))
    assert members.set_sizes.tolist() == [2, 1]


# the command line: exit 2, one line, no traceback -------------------------------------

@pytest.mark.parametrize("command", ["sign", "run"])
def test_the_command_line_prints_one_line_and_exits_2(tmp_path, command):
    path = tmp_path / "ragged.csv"
    path.write_text("patron,title\na,x\nb,Smith, John\n")
    late = tmp_path / "late"
    late.mkdir()
    events().write_parquet(late / "a.parquet")
    (late / "b.parquet").write_text("patron,title\n1,2\n")
    for source, fragment in ((path, "line 3"), (late, "b.parquet")):
        args = [sys.executable, "-m", "lshjob.cli.app", command, str(source), "--entity", "patron",
                "--element", "title", "--out", str(tmp_path / "out")]
        if command == "run":
            args += ["--threshold", "0.5"]
        done = subprocess.run(args, capture_output=True, text=True, timeout=300)
        assert done.returncode == 2, done.stderr
        lines = done.stderr.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in done.stderr and fragment in lines[0]


def test_a_bad_value_is_placed_in_its_own_file(tmp_path):
    # The second file's third line (header = line 1); rows of the first file do not count.
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "a.csv").write_text("patron,title,at\n" + "p,x,2026-01-02\n" * 50)
    (folder / "b.csv").write_text("patron,title,at\nq,y,2026-01-03\nr,z,last tuesday\n")
    spec = EventSpec(entity="patron", element="title", time="at", period="week")
    refused(tmp_path, folder, "b.csv", "'at'", "'last tuesday'", "line 3", specs=(spec,))
    (folder / "b.csv").write_text("patron,title,at\nq,y,2026-01-03\n,z,2026-01-04\n")
    refused(tmp_path, folder, "b.csv", "'patron'", "1 null", "line 3", specs=(spec,))


@pytest.mark.parametrize("parts", [None, 2])
def test_unsigned_entity_keys_above_2_63_through_a_run(tmp_path, parts):
    from lshjob.jobs.run import RunOptions, run_job

    entities = [2**63, 2**64 - 1, 5, 2**63 + 7]
    rows = [(e, t) for e in entities for t in range(10)] + [(2**63 + 7, 99)]
    path = tmp_path / "u64.parquet"
    pl.DataFrame(rows, schema={"patron": pl.UInt64, "title": pl.UInt64}, orient="row").write_parquet(path)
    sets = oracle_sets(pl.read_parquet(path))
    run_job(path, SPEC, RunOptions(threshold=0.5, bands=16, rows=2, parts=parts), tmp_path / "index")
    got = {(a, b): j for a, b, j in pl.read_parquet(tmp_path / "index" / "neighbours.parquet")
           .select("entity", "neighbour", "jaccard").rows()}
    # oracle: brute-force Jaccard over Python sets (every pair here is at least 10/11)
    expected = {(a, b): len(sets[a] & sets[b]) / len(sets[a] | sets[b]) for a in sets for b in sets if a != b}
    assert got.keys() == expected.keys()
    assert all(abs(got[p] - expected[p]) < 1e-12 for p in got)
    (tmp_path / "one").mkdir()
    (tmp_path / "two").mkdir()
    sign_file(path, tmp_path / "one" / "s.parquet", SPEC)
    sign_file(path, tmp_path / "two" / "s.parquet", SPEC, parts=2)
    assert pl.read_parquet(tmp_path / "one" / "s.parquet").equals(pl.read_parquet(tmp_path / "two" / "s.parquet"))


def test_ndjson_key_numeric_for_many_lines_then_text(tmp_path):
    path = tmp_path / "late.ndjson"
    path.write_text("".join(f'{{"patron": {i % 7}, "title": {i}, "branch": "H"}}\n' for i in range(500))
                    + '{"patron": "x", "title": 3, "branch": "H"}\n')
    for spec in (SPEC, SEGMENTED):
        sets, _ = load_sets(path, spec)
        assert sets["entity"].dtype == pl.String  # one text value: the column is text
        expected = {str(i % 7) for i in range(500)} | {"x"}
        assert set(sets["entity"]) == expected
    members, _ = load_membership(path, SPEC)
    assert members.size == 8


def test_unicode_option_on_the_command_line(tmp_path):
    path = tmp_path / "names.parquet"
    unicode_events(["NFC", "NFD"]).write_parquet(path)
    counts = []
    for mode in ("nfc", "asis"):
        done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "sign", str(path), "--entity", "patron",
                               "--element", "title", "--out", str(tmp_path / f"{mode}.parquet"), "--unicode", mode],
                              capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        counts.append(pl.read_parquet(tmp_path / f"{mode}.parquet").height)
    assert counts == [2, 4]
    # The run reads the same choice from its configuration file (NFC and NFD names: 4 patrons
    # as given, 2 in NFC; oracle: unicodedata, as unicode_events builds them).
    for mode, entities in (("nfc", 2), ("asis", 4)):
        config = tmp_path / f"{mode}.toml"
        config.write_text(f'events = "names.parquet"\nentity = "patron"\nelement = "title"\n'
                          f'threshold = 0.5\nout = "idx-{mode}"\nunicode = "{mode}"\n')
        done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", "--config", str(config), "--json"],
                              capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        assert json.loads(done.stdout)["counts"]["entities"] == entities


@pytest.mark.parametrize("text", [
    "\ufeffpatron,title,branch\r\na,x,Harbour\r\nb,\"y, z\",Harbour\r\n",  # byte-order mark, CRLF, a quoted separator
    'patron,title,branch\na,"two\nlines",Harbour\nb,"say ""hi"", ok",Harbour\n',  # a quoted line break, doubled quotes
])
def test_well_formed_csv_variants_are_not_ragged(tmp_path, text):
    path = tmp_path / "ok.csv"
    path.write_bytes(text.encode())
    expected = pl.read_csv(path, infer_schema=False).select("patron", "title")  # oracle: polars' own reading
    for spec in (SPEC, SEGMENTED):
        sets, _ = load_sets(path, spec)
        assert sorted(sets.select("entity", "element").rows()) == sorted(expected.rows())


@pytest.mark.parametrize("text_entity", [True, False])
def test_a_corrupt_page_is_named_when_signing_and_running_in_parts(tmp_path, text_entity):
    # Oracle: the file written with a corrupt page is the one named, whatever pass meets it
    # first (the count of events per entity that cuts key ranges, for sign and run alike).
    from lshjob.jobs.run import RunOptions, run_job

    rng = np.random.default_rng(2)
    patrons = [f"p{i % 1000}" for i in range(50000)] if text_entity else [i % 1000 for i in range(50000)]
    big = pl.DataFrame({"patron": patrons, "title": rng.integers(0, 10**9, 50000), "branch": ["Harbour"] * 50000})
    folder = tmp_path / "in"
    folder.mkdir()
    big.head(100).write_parquet(folder / "a.parquet")
    big.write_parquet(tmp_path / "good.parquet")
    (folder / "b.parquet").write_bytes(corrupt_copy((tmp_path / "good.parquet").read_bytes()))
    for spec in (SPEC, SEGMENTED):
        out = tmp_path / "out" / "sig.parquet"
        with pytest.raises(InputError) as err:
            sign_file(folder, out, spec, parts=2)
        assert "b.parquet" in str(err.value) and "\n" not in str(err.value)
        assert not out.exists()
    with pytest.raises(InputError) as err:
        run_job(folder, SPEC, RunOptions(threshold=0.5, parts=2), tmp_path / "idx")
    assert "b.parquet" in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "idx").exists()
