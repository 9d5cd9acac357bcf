"""The stage contracts (lshjob.contracts): every rule refuses a table that breaks it; the
manifest and the signature file's metadata refuse what they do not declare; DEVELOPERS.md
holds the section the declarations print. The tables of a real run, at each stage boundary:
tests/test_contract_boundaries.py.

Oracles: hand-made tables whose one broken row is known; DEVELOPERS.md's text."""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import sys
from pathlib import Path

import polars as pl
import pytest

from lshjob.contracts import (
    ALL,
    BUCKET_ROWS,
    CANDIDATES,
    EVENTS,
    NEIGHBOURS,
    SET_ROWS,
    SIGNATURES,
    VERIFIED,
    ContractError,
    Manifest,
    read_manifest,
)
from lshjob.contracts.doc import BEGIN, END, markdown
from lshjob.contracts.signature_file import SignatureMeta
from lshjob.errors import InputError
from lshjob.sign.signatures import read_signatures

ROOT = Path(__file__).resolve().parent.parent


def _events(**change) -> pl.DataFrame:
    columns = {"entity": [1, 1, 2], "element": ["a", "b", "a"], "weight": [1.0, 2.0, 1.0]}
    return pl.DataFrame({**columns, **change})


def _dated(day: int) -> pl.DataFrame:
    return _events().with_columns(period=pl.Series([dt.date(2026, 3, 1), dt.date(2026, 3, day), dt.date(2026, 4, 1)]))


def _signatures(entity=("a", "b"), set_size=(3, 2)) -> pl.DataFrame:
    return pl.DataFrame({"entity": list(entity), "signature": [[1, 2, 3], [4, 5, 6]], "set_size": list(set_size)},
                        schema={"entity": pl.String, "signature": pl.List(pl.UInt64), "set_size": pl.UInt32})


def _buckets(band=(0, 0, 1, 1), bucket=(7, 7, 9, 9), rep=(0, 2, 0, 2)) -> pl.DataFrame:
    return pl.DataFrame({"band": list(band), "bucket": list(bucket), "rep": list(rep)},
                        schema=BUCKET_ROWS.schema)


def _pairs(left=(0, 0), right=(2, 3), bands_shared=(1, 2), **more) -> pl.DataFrame:
    schema = {"left_rep": pl.Int64, "right_rep": pl.Int64, **{k: pl.Float64 for k in more},
              "bands_shared": pl.Int32}
    return pl.DataFrame({"left_rep": list(left), "right_rep": list(right), **{k: list(v) for k, v in more.items()},
                         "bands_shared": list(bands_shared)}, schema=schema)


def _verified(jaccard=(0.5, 1.0), estimate=(0.5, 0.9), **pairs) -> pl.DataFrame:
    return _pairs(**pairs, jaccard=jaccard, estimate=estimate)


def _neighbours(entity=("a", "a", "b"), neighbour=("b", "c", "a"), jaccard=(0.8, 0.6, 0.8),
                estimate=(0.75, 0.5, 0.75), rank=(1, 2, 1)) -> pl.DataFrame:
    return pl.DataFrame({"entity": list(entity), "neighbour": list(neighbour), "jaccard": list(jaccard),
                         "estimate": list(estimate), "bands_shared": [2, 1, 2], "rank": list(rank)},
                        schema={**{c: pl.String for c in ("entity", "neighbour")}, **{
                            c: t for c, t in NEIGHBOURS.schema.items() if c not in ("entity", "neighbour")}})


REPS = pl.Series([0, 2, 3])
PAIR_VALUES = {"bands": 2, "entities": 4, "representatives": REPS}
VALID = [  # (contract, a table keeping every rule, the run's values)
    (EVENTS, _events(), {}),
    (EVENTS, _dated(1), {"period_unit": "month"}),
    (SET_ROWS, _events(), {"min_count": 1}),
    (SIGNATURES, _signatures(), {"k": 3}),
    (BUCKET_ROWS, _buckets(), {"bands": 2, "entities": 3, "representatives": REPS}),
    (CANDIDATES, _pairs(), PAIR_VALUES),
    (CANDIDATES, _pairs(bands_shared=(0, 0)), {**PAIR_VALUES, "bands": 0}),  # identical-only plan
    (CANDIDATES, _pairs(right=(2, 2), bands_shared=(1, 1)), PAIR_VALUES),  # a row per band the pair met in
    (VERIFIED, _verified(), {**PAIR_VALUES, "threshold": 0.5}),
    (VERIFIED, _verified(estimate=(0.5, 1.0), bands_shared=(0, 0)), {**PAIR_VALUES, "bands": 0, "threshold": 1 / 2}),
    (NEIGHBOURS, _neighbours(), {"top_k": 2, "threshold": 0.5, "bands": 2}),
]

# (contract, rule, broken table, the run's values, the offending value shown)
BROKEN = [
    (EVENTS, "no null key or element", _events(element=["a", None, "a"]), {}, "element=None"),
    (EVENTS, "weight is finite and >= 0", _events(weight=[1.0, -1.0, 1.0]), {}, "weight=-1.0"),
    (EVENTS, "weight is finite and >= 0", _events(weight=[1.0, float("inf"), 1.0]), {}, "weight=inf"),
    (EVENTS, "period is the first day of its period_unit", _dated(14), {"period_unit": "month"},
     "period=datetime.date(2026, 3, 14)"),
    (SET_ROWS, "one row per (keys, element)", _events(element=["a", "a", "a"]), {"min_count": 1}, "entity=1"),
    (SET_ROWS, "sorted by the key columns", _events(entity=[2, 1, 1], element=["a", "a", "b"]), {"min_count": 1},
     "entity=2"),
    (SET_ROWS, "weight >= min_count", _events(), {"min_count": 1.5}, "weight=1.0"),
    (SIGNATURES, "one row per key", _signatures(entity=("a", "a")), {"k": 3}, "entity='a'"),
    (SIGNATURES, "sorted by the key columns", _signatures(entity=("b", "a")), {"k": 3}, "entity='b'"),
    (SIGNATURES, "signature holds k values", _signatures(), {"k": 4}, "signature=[1, 2, 3]"),
    (SIGNATURES, "set_size >= 1", _signatures(set_size=(3, 0)), {"k": 3}, "set_size=0"),
    (BUCKET_ROWS, "0 <= band < bands", _buckets(), {"bands": 1}, "band=1"),
    (BUCKET_ROWS, "a (band, bucket) holds >= 2 rows", _buckets(bucket=(7, 8, 9, 9)), {}, "band=0, bucket=7"),
    (BUCKET_ROWS, "one row per (band, rep)", _buckets((0, 0, 0), (7, 7, 7), (0, 2, 0)), {}, "band=0, rep=0"),
    (BUCKET_ROWS, "0 <= rep < entities (entity ids)", _buckets(), {"entities": 2}, "rep=2"),
    (BUCKET_ROWS, "rep is a representative", _buckets(), {"representatives": pl.Series([0])}, "rep=2"),
    (CANDIDATES, "left_rep < right_rep", _pairs(left=(0, 3), right=(2, 0)), PAIR_VALUES, "left_rep=3, right_rep=0"),
    # a pair may take a row per band it met in, so long as its rows sum to at most bands
    (CANDIDATES, "a pair's rows sum bands_shared to at most bands", _pairs(right=(2, 2), bands_shared=(2, 2)),
     {**PAIR_VALUES, "bands": 3}, "left_rep=0, right_rep=2"),
    (CANDIDATES, "1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _pairs(bands_shared=(1, 3)),
     PAIR_VALUES, "bands_shared=3"),
    (CANDIDATES, "1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _pairs(bands_shared=(0, 2)),
     PAIR_VALUES, "bands_shared=0"),
    (CANDIDATES, "1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _pairs(),
     {**PAIR_VALUES, "bands": 0}, "bands_shared=1"),
    (CANDIDATES, "0 <= left_rep, right_rep < entities (entity ids)", _pairs(), {**PAIR_VALUES, "entities": 3},
     "left_rep=0, right_rep=3"),
    (CANDIDATES, "left_rep and right_rep are representatives", _pairs(),
     {**PAIR_VALUES, "representatives": pl.Series([0, 2])}, "left_rep=0, right_rep=3"),
    (VERIFIED, "left_rep < right_rep", _verified(left=(0, 3), right=(2, 0)), PAIR_VALUES, "left_rep=3, right_rep=0"),
    (VERIFIED, "one row per pair", _verified(right=(2, 2)), PAIR_VALUES, "left_rep=0, right_rep=2"),
    (VERIFIED, "threshold <= jaccard <= 1", _verified(), {"threshold": 0.6}, "jaccard=0.5"),
    (VERIFIED, "threshold <= jaccard <= 1", _verified(jaccard=(0.5, 1.5)), {"threshold": 0.5}, "jaccard=1.5"),
    (VERIFIED, "0 <= estimate <= 1", _verified(estimate=(0.5, 1.25)), {}, "estimate=1.25"),
    (VERIFIED, "estimate = jaccard when the plan has no bands", _verified(bands_shared=(0, 0)), {"bands": 0},
     "jaccard=1.0, estimate=0.9"),
    (VERIFIED, "1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _verified(), {"bands": 1},
     "bands_shared=2"),
    (VERIFIED, "0 <= left_rep, right_rep < entities (entity ids)", _verified(), {"entities": 3},
     "left_rep=0, right_rep=3"),
    (VERIFIED, "left_rep and right_rep are representatives", _verified(), {"representatives": pl.Series([0, 3])},
     "left_rep=0, right_rep=2"),
    (NEIGHBOURS, "entity != neighbour", _neighbours(entity=("a", "a", "b"), neighbour=("b", "c", "b")), {},
     "entity='b', neighbour='b'"),
    (NEIGHBOURS, "one row per (entity, neighbour)", _neighbours(neighbour=("b", "b", "a")), {},
     "entity='a', neighbour='b'"),
    (NEIGHBOURS, "sorted by entity", _neighbours(entity=("b", "a", "a"), neighbour=("a", "b", "c"),
                                                 jaccard=(0.8, 0.8, 0.6), rank=(1, 1, 2)), {}, "entity='a'"),
    (NEIGHBOURS, "rank is 1, 2, ... within an entity", _neighbours(rank=(2, 1, 1)), {}, "rank=2"),
    (NEIGHBOURS, "rank <= top_k", _neighbours(), {"top_k": 1}, "rank=2"),
    (NEIGHBOURS, "jaccard non-increasing with rank, ties by neighbour ascending",
     _neighbours(jaccard=(0.6, 0.8, 0.8)), {}, "entity='a', neighbour='c', jaccard=0.8"),
    (NEIGHBOURS, "jaccard non-increasing with rank, ties by neighbour ascending",
     _neighbours(neighbour=("c", "b", "a"), jaccard=(0.8, 0.8, 0.8)), {}, "entity='a', neighbour='b', jaccard=0.8"),
    (NEIGHBOURS, "threshold <= jaccard <= 1", _neighbours(), {"threshold": 0.7}, "jaccard=0.6"),
    (NEIGHBOURS, "0 <= estimate <= 1", _neighbours(estimate=(0.75, -0.1, 0.75)), {}, "estimate=-0.1"),
    (NEIGHBOURS, "1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _neighbours(), {"bands": 1},
     "bands_shared=2"),
]


@pytest.mark.parametrize("contract, table, values", VALID, ids=lambda v: getattr(v, "name", ""))
def test_a_table_keeping_every_rule_passes(contract, table, values):
    # Oracle: the hand-made table, which keeps every rule by construction.
    assert contract.check(table, **values) is table


@pytest.mark.parametrize("contract, rule, table, values, shown", BROKEN,
                         ids=[f"{c.name}: {r}" for c, r, *_ in BROKEN])
def test_a_table_breaking_a_rule_is_refused_in_one_line(contract, rule, table, values, shown):
    # Oracle: the hand-made table, whose broken row and value are known.
    with pytest.raises(ContractError) as caught:
        contract.check(table, **values)
    message = str(caught.value)
    assert "\n" not in message and message.startswith(f"{contract.name}: rule '{rule}' broken by ")
    assert shown in message


def test_every_rule_of_every_contract_has_a_breaking_table():
    # Oracle: the contracts' own list of rules.
    declared = {(c.name, text) for c in ALL for text, _ in c.rules}
    assert declared == {(c.name, rule) for c, rule, *_ in BROKEN}


@pytest.mark.parametrize("contract", ALL, ids=lambda c: c.name)
def test_a_missing_an_extra_or_a_mistyped_column_is_refused(contract):
    # Oracle: the contract's schema, changed one column at a time.
    table = contract.empty(key=pl.Int64)
    assert contract.check(table).schema == table.schema and table.height == 0
    first = table.columns[0]
    with pytest.raises(ContractError, match=f"^{contract.name}: column '{first}' missing; columns are: "):
        contract.check(table.drop(first))
    with pytest.raises(ContractError, match=f"^{contract.name}: column 'extra' not in the contract"):
        contract.check(table.with_columns(extra=pl.lit(1)))
    with pytest.raises(ContractError, match=f"^{contract.name}: column '{first}' has type Float32; expected "):
        contract.check(table.with_columns(pl.col(first).cast(pl.Float32)))


def test_keys_are_text_or_integer_and_optional_columns_come_when_named():
    # Oracle: EVENTS's declared types (key: String or integer; segment, period optional).
    assert EVENTS.empty(key=pl.UInt32, columns=["period"]).schema == pl.Schema(
        {"entity": pl.UInt32, "period": pl.Date, "element": pl.String, "weight": pl.Float64})
    EVENTS.check(_events(entity=["x", "x", "y"]))
    with pytest.raises(ContractError, match="column 'entity' has type Float64; expected key"):
        EVENTS.check(_events(entity=[1.0, 1.0, 2.0]))


def test_conform_orders_and_casts_to_the_contract():
    # Oracle: NEIGHBOURS's declared order and types.
    loose = _neighbours().select("rank", "entity", "neighbour", "jaccard", "estimate",
                                 pl.col("bands_shared").cast(pl.Int64))
    assert NEIGHBOURS.conform(loose).equals(_neighbours())


def test_developers_md_holds_the_generated_section_exactly():
    # Oracle: DEVELOPERS.md as committed, and the module's output as a command.
    text = (ROOT / "DEVELOPERS.md").read_text()
    assert text.count(BEGIN) == 1 and text.count(END) == 1
    section = text[text.index(BEGIN):text.index(END) + len(END)] + "\n"
    assert section == markdown()
    printed = subprocess.run([sys.executable, "-m", "lshjob.contracts"], capture_output=True, text=True, check=True)
    assert printed.stdout == markdown()


def test_the_sql_files_name_the_contracts_instead_of_listing_columns():
    # Oracle: the SQL headers; each table read or written between stages is named by its contract.
    sql = {p.name: p.read_text() for p in (ROOT / "lshjob/index/sql").glob("*.sql")}
    assert "BUCKET_ROWS" in sql["sized_bucket_rows.sql"] and "CANDIDATES" in sql["candidates.sql"]
    assert "CANDIDATES" in sql["candidate_blocks.sql"]
    assert "columns band, bucket, rep" not in sql["sized_bucket_rows.sql"]



def _manifest() -> Manifest:
    return Manifest(run_id="20260301T101500Z-0a1b2c", started_at="2026-03-01T10:15:00Z",
                    finished_at="2026-03-01T10:15:04Z", host="branch-harbour", command=None,
                    inputs={"source": "/data/loans.parquet"}, spec={"entity": "patron"},
                    options={"threshold": 0.5, "top_k": 20}, top_k_effective=20, memory_budget_bytes=2**30,
                    plan={"mode": "data"}, counts={"entities": 3}, skew=None,
                    seconds={"ingest": 1.5, "total": 4.0}, peak_memory_bytes={"ingest": 2**20},
                    versions={"lshjob": "0"}, output={"rows": 0}, out="/data/index", warnings=[])


@pytest.mark.parametrize("damage, problem", [
    (lambda text: text[: len(text) // 2], "not valid JSON .* the file is cut short or damaged"),
    (lambda text: text.replace('"format_version": 1', '"format_version": 2'),
     "manifest format version 2 is not supported; this lshjob reads version 1"),
    (lambda text: text.replace('"lshjob-index"', '"library-loans"'),
     "not an lshjob manifest \\(format 'library-loans'; expected 'lshjob-index'\\)"),
    (lambda text: text.replace('"total": 4.0', '"all": 4.0'),
     "not an lshjob manifest \\(no 'total' entry in 'seconds'\\)"),
    (lambda text: text.replace('"top_k": 20', '"top_n": 20'),
     "not an lshjob manifest \\(no 'top_k' entry in 'options'\\)"),
])
def test_a_damaged_manifest_is_refused_in_one_line(tmp_path, damage, problem):
    # Oracle: the hand-made manifest, read back whole, then damaged one way at a time.
    path = tmp_path / "manifest.json"
    _manifest().write(path)
    assert read_manifest(path) == _manifest()
    path.write_text(damage(path.read_text()))
    with pytest.raises(InputError, match=f"^{path}: {problem}") as caught:
        read_manifest(path)
    assert "\n" not in str(caught.value)


def test_a_manifest_without_total_seconds_cannot_be_made():
    # Oracle: the manifest's rule that seconds hold "total" (what --json shows is what is written).
    with pytest.raises(ValueError, match="total"):
        Manifest(**{**_manifest().__dict__, "seconds": {"ingest": 1.5}})


@pytest.mark.parametrize("change, problem", [
    ({"format_version": 2}, "signature format 'lshjob-signatures' version 2 is not supported"),
    ({"set_size": "guessed"}, "signature metadata 'set_size' is 'guessed'"),
    ({"period_unit": "year"}, "signature metadata 'period_unit' is 'year'"),
    ({"k": 0}, "signature metadata k=0"),
])
def test_signature_metadata_out_of_its_contract_is_refused(tmp_path, change, problem):
    # Oracle: the declared SignatureMeta entries, one changed at a time.
    meta = {**SignatureMeta(scheme="kperm", hash="h", k=2, seed=1, keys=["entity"]).to_json(), **change}
    path = tmp_path / "s.parquet"
    _signatures().with_columns(pl.col("signature").list.head(2)).write_parquet(path, metadata={
        "lshjob": json.dumps(meta)})
    with pytest.raises(InputError, match=f"^{path}: {problem}"):
        read_signatures(path)
