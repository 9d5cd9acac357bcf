"""Every stage boundary of a real run keeps its contract (lshjob.contracts.tables): the library
demo at 300 patrons through the Python API, each table read where the run hands it on (the
work folder's files, read while the run is going on, or the functions' returns).

Oracle: exact brute force over Python sets of the events' titles per patron."""

from __future__ import annotations

import json
import subprocess
import sys
from itertools import combinations

import polars as pl
import pytest

from lshjob.contracts import (
    BUCKET_ROWS,
    CANDIDATES,
    EVENTS,
    NEIGHBOURS,
    SET_ROWS,
    SIGNATURES,
    STAGES,
    VERIFIED,
    read_manifest,
)
from lshjob.contracts.signature_file import file_meta
from lshjob.demo.generate import generate_events
from lshjob.index.join import duckdb as duckdb_join
from lshjob.index.verify import local as local_verify
from lshjob.ingest.spec import EventSpec, load_sets, validated_events
from lshjob.jobs import prepare, run
from lshjob.jobs.sign import sign_file
from lshjob.sign.signatures import SignatureParams, read_signatures

SPEC = EventSpec(entity="patron", element="title")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """(events file, {patron: set of titles}) of the demo at 300 patrons."""
    events, _ = generate_events(300, seed=5)
    path = tmp_path_factory.mktemp("demo") / "loans.parquet"
    events.write_parquet(path)
    sets = {p: set(t) for p, t in events.group_by("patron").agg(pl.col("title")).iter_rows()}
    return path, events, sets


def _jaccard(a: set, b: set) -> float:
    return len(a & b) / len(a | b)


def _spy(monkeypatch, module, name, seen, keep=lambda args, result: result):
    """Call ``module.name`` as the run does, keeping ``keep(args, result)`` in ``seen[name]`` (read
    then: the work folder is removed when the run ends)."""
    original = getattr(module, name)

    def spied(*args, **kwargs):
        result = original(*args, **kwargs)
        seen[name] = keep(args, result)
        return result
    monkeypatch.setattr(module, name, spied)


def test_ingest_gives_events_and_set_rows_keeping_their_contracts(demo):
    path, events, sets = demo
    frame, _, _ = validated_events(path, SPEC)
    EVENTS.check(frame.collect())
    rows, _ = load_sets(path, SPEC)
    SET_ROWS.check(rows, min_count=SPEC.min_count)
    # Oracle: the distinct (patron, title) pairs of the events and their event counts, in Python.
    counts = {}
    for patron, title in events.select("patron", "title").iter_rows():
        counts[patron, title] = counts.get((patron, title), 0) + 1
    assert {(e, t): w for e, t, w in rows.iter_rows()} == counts
    assert {p for p, _ in counts} == set(sets)


def test_the_signature_file_keeps_its_contract(demo, tmp_path):
    path, _, sets = demo
    out = tmp_path / "signatures.parquet"
    sign_file(path, out, SPEC, SignatureParams(perms=32, seed=3))
    table, _ = read_signatures(out)
    SIGNATURES.check(table, k=32)
    meta = file_meta(pl.read_parquet_metadata(out), str(out))
    assert (meta.scheme, meta.k, meta.seed, meta.keys, meta.set_size) == ("kperm", 32, 3, ["entity"], "exact")
    # Oracle: each patron's number of distinct titles, by Python sets.
    assert dict(zip(table["entity"], table["set_size"])) == {p: len(s) for p, s in sets.items()}


def test_every_table_of_a_run_keeps_its_contract_at_its_boundary(demo, tmp_path, monkeypatch):
    path, _, sets = demo
    seen = {}
    _spy(monkeypatch, prepare, "in_one_part", seen)
    _spy(monkeypatch, duckdb_join, "candidate_pairs", seen,
         lambda args, _: (pl.read_parquet(args[0]), pl.read_parquet(args[1])))  # bucket files, candidates
    _spy(monkeypatch, local_verify, "verify_blocks", seen)
    returned = run.run_job(path, SPEC, run.RunOptions(threshold=0.5, top_k=5), tmp_path / "index")

    built = seen["in_one_part"]
    keys = sorted(sets)  # Oracle: entity ids are positions in the sorted keys; a group's smallest id represents it
    first = {}
    assert built.keys.to_list() == keys
    assert built.rep_of.tolist() == [first.setdefault(frozenset(sets[k]), i) for i, k in enumerate(keys)]
    values = {"entities": len(keys), "representatives": pl.Series(sorted(set(first.values()))),
              "bands": returned["plan"]["bands"]}
    assert values["bands"] >= 1

    buckets = BUCKET_ROWS.check(seen["candidate_pairs"][0], **values)
    candidates = CANDIDATES.check(seen["candidate_pairs"][1], **values)
    # Oracle: the pairs of each shared bucket, counted over the bands in Python.
    met = {}
    for members in buckets.group_by("band", "bucket").agg("rep")["rep"].to_list():
        for pair in combinations(sorted(members), 2):
            met[pair] = met.get(pair, 0) + 1
    assert returned["skew"]["oversize_buckets"] == 0
    assert {(a, b): n for a, b, n in candidates.iter_rows()} == met

    verified = VERIFIED.check(seen["verify_blocks"], threshold=0.5, **values)
    # Oracle: exact Jaccard of every candidate by Python sets; verified = candidates reaching 0.5.
    exact = {(a, b): _jaccard(sets[keys[a]], sets[keys[b]]) for a, b in met}
    assert {(a, b): j for a, b, j, *_ in verified.iter_rows()} == {p: j for p, j in exact.items() if j >= 0.5}

    neighbours = NEIGHBOURS.check(pl.read_parquet(tmp_path / "index/neighbours.parquet"), threshold=0.5, top_k=5,
                                  bands=values["bands"])
    assert neighbours.height == returned["counts"]["published_rows"] > 0
    reps = dict(zip(keys, built.rep_of.tolist()))
    for entity, neighbour, jaccard, *_ in neighbours.iter_rows():  # Oracle: Python sets, and the verified pairs
        assert jaccard == _jaccard(sets[entity], sets[neighbour])
        pair = tuple(sorted((reps[entity], reps[neighbour])))
        assert pair in exact or pair[0] == pair[1]

    on_disk = read_manifest(tmp_path / "index/manifest.json")
    assert on_disk.to_json() == returned and on_disk.seconds["total"] > 0
    assert list(returned["seconds"]) == [name for name, _ in STAGES] + ["total"]  # the documented order


def test_identical_sets_in_parts_keep_the_contracts_with_no_bands(demo, tmp_path, monkeypatch):
    path, _, sets = demo
    seen = {}
    _spy(monkeypatch, prepare, "in_parts", seen)
    _spy(monkeypatch, local_verify, "verify_blocks", seen, lambda args, result: (pl.read_parquet(
        sorted(str(p) for p in args[0].rglob("*.parquet")), hive_partitioning=False), result))  # candidates
    returned = run.run_job(path, SPEC, run.RunOptions(threshold=1.0, parts=2), tmp_path / "index")
    assert returned["plan"]["mode"] == "identical-only" and returned["counts"]["parts"] == 2

    built = seen["in_parts"]
    n = len(built.keys)
    values = {"entities": n, "representatives": pl.Series([i for i in range(n) if built.rep_of[i] == i]), "bands": 0}
    candidates, verified = seen["verify_blocks"]
    candidates = CANDIDATES.check(candidates, **values)
    VERIFIED.check(verified, threshold=1.0, **values)
    assert candidates.height == returned["counts"]["candidate_pairs"] > 0

    neighbours = NEIGHBOURS.check(pl.read_parquet(tmp_path / "index/neighbours.parquet"), threshold=1.0,
                                  top_k=returned["top_k_effective"], bands=0)
    # Oracle: every ordered pair of patrons with equal sets of titles (Python sets; no group
    # is larger than top-k + 1 here, so none is cut).
    equal = {(a, b) for a in sets for b in sets if a != b and sets[a] == sets[b]}
    assert set(neighbours.select("entity", "neighbour").iter_rows()) == equal


def test_what_run_json_prints_is_the_manifest_on_disk(tmp_path, small_events):
    # Oracle: manifest.json as json reads it, against the command's stdout.
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", str(small_events), "--entity", "patron",
                           "--element", "title", "--threshold", "0.3", "--out", str(tmp_path / "idx"), "--json"],
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    printed = json.loads(done.stdout)
    assert printed == read_manifest(tmp_path / "idx/manifest.json").to_json()
    assert printed["seconds"]["total"] >= max(v for k, v in printed["seconds"].items() if k != "total")
