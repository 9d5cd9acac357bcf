"""Runs a key range at a time (lshjob/jobs/parts.py): the same index as one part, exact sets,
every event in exactly one part."""

import json

import numpy as np
import polars as pl
import pytest
from helpers import planted_pairs, same_index
from test_run import brute_force_pairs, published_pairs

from lshjob import EventSpec, ParameterError
from lshjob.core.sets import ElementSets
from lshjob.index.verify import jaccard_between
from lshjob.ingest.loading import entity_counts, event_bytes, membership_of, open_events
from lshjob.jobs.run import RunOptions, run_job
from lshjob.report.text import run_report
from lshjob.runtime import budget, partitions

SPEC = EventSpec(entity="patron", element="title")


def loans_with_identical_groups(seed: int, integer_patrons: bool) -> pl.DataFrame:
    """Planted pairs and background patrons, plus groups of patrons with identical sets spread
    over the whole key order (so they fall into different parts), and repeated loans."""
    events = planted_pairs(300, 0.3, seed=seed, background=400)
    rng = np.random.default_rng(seed)
    names = events["patron"].unique().sort().to_list()
    extra_p, extra_t = [], []
    for g in range(6):  # six groups of identical sets, members spread over the key order
        titles = [f"G{g}-{t}" for t in range(int(rng.integers(3, 9)))]
        for m in range(int(rng.integers(2, 7))):
            name = f"{names[int(rng.integers(len(names)))]}~{g}{m}"
            extra_p += [name] * len(titles)
            extra_t += titles
    events = pl.concat([events, pl.DataFrame({"patron": extra_p, "title": extra_t})])
    events = pl.concat([events, events.sample(2000, seed=seed)])  # repeated loans count once
    if integer_patrons:
        order = events["patron"].unique().sort()
        events = events.with_columns(patron=(order.search_sorted(events["patron"]) * 3 + 1000).cast(pl.Int32))
    return events.sample(fraction=1.0, shuffle=True, seed=seed)


@pytest.mark.parametrize("integer_patrons", [False, True])
@pytest.mark.parametrize("scheme", ["kperm", "oph"])
def test_an_index_built_in_parts_equals_the_index_built_in_one(tmp_path, integer_patrons, scheme):
    # Reference: the same run holding every set at once (itself checked against scipy brute
    # force in test_run.py); published pairs are also checked against brute force here.
    events = loans_with_identical_groups(5, integer_patrons)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    options = dict(threshold=0.4, perms=64, bands=16, rows=4, scheme=scheme, top_k=200)
    one = run_job(src, SPEC, RunOptions(**options), tmp_path / "one")
    four = run_job(src, SPEC, RunOptions(**options, parts=4), tmp_path / "four")
    assert one["counts"]["parts"] == 1 and four["counts"]["parts"] == 4
    # Identical sets in different parts keep a representative each, paired by fingerprint too.
    assert four["counts"]["representatives"] > one["counts"]["representatives"]
    for name in ("events", "entities", "membership_rows"):
        assert four["counts"][name] == one["counts"][name]
    assert same_index(tmp_path / "one", tmp_path / "four")
    truth = brute_force_pairs(events.with_columns(pl.col("patron").cast(pl.String)), 0.4)
    got = {tuple(sorted(map(str, k))): v for k, v in published_pairs(tmp_path / "four").items()}
    assert len(got) > 200
    for pair, jac in got.items():
        assert abs(truth[pair] - jac) <= 1e-12


def test_weighted_events_and_empty_sets_in_parts(tmp_path):
    # Reference: one part. A count column and --min-count drop elements, and leave some
    # patrons with nothing; the run in parts reports the same counts and index.
    rng = np.random.default_rng(2)
    n = 6000
    events = pl.DataFrame({
        "patron": [f"p{int(x):04d}" for x in rng.integers(0, 400, n)],
        "title": rng.integers(0, 300, n).astype(np.int64),
        "loans": rng.integers(1, 4, n),
    })
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", count="loans", min_count=4)
    options = dict(threshold=0.2, perms=64, bands=32, rows=2, top_k=100)
    one = run_job(src, spec, RunOptions(**options), tmp_path / "one")
    three = run_job(src, spec, RunOptions(**options, parts=3), tmp_path / "three")
    assert one["counts"]["empty_after_filter"] > 0
    for name in ("entities", "membership_rows", "empty_after_filter", "published_rows"):
        assert three["counts"][name] == one["counts"][name], name
    assert same_index(tmp_path / "one", tmp_path / "three")


def test_a_small_budget_turns_to_parts_by_itself(tmp_path, demo_events, monkeypatch):
    # The budget (not an option) decides: with shares shrunk so that these few events
    # exceed them, the run goes in parts and records how many; the index is the same.
    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    options = RunOptions(threshold=0.5, perms=64, bands=16, rows=4)
    run_job(src, SPEC, options, tmp_path / "one")
    monkeypatch.setattr(budget, "ONE_PART_SHARE", 1e-6)
    monkeypatch.setattr(budget.Budget, "range_bytes", lambda self, entities, share=None, reserve=0: 200_000)
    manifest = run_job(src, SPEC, options, tmp_path / "parts")
    assert manifest["counts"]["parts"] > 1
    written = json.loads((tmp_path / "parts/manifest.json").read_text())
    assert written["counts"]["parts"] == manifest["counts"]["parts"]
    assert "count" in written["seconds"] and "count" in written["peak_memory_bytes"]
    assert same_index(tmp_path / "one", tmp_path / "parts")


@pytest.mark.parametrize("integer_patrons", [False, True])
def test_key_ranges_hold_every_event_once_in_key_order(tmp_path, integer_patrons):
    # Reference: brute force over the events (polars filter per range).
    events = loans_with_identical_groups(9, integer_patrons)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    source = open_events(src, SPEC)
    counts = entity_counts(source)
    ranges = partitions.key_ranges(counts, 1, parts=5, event_bytes=event_bytes(source))
    assert len(ranges) == 5
    seen = []
    for r in ranges:
        inside = events.rename({"patron": "entity"}).filter(r.condition)
        assert inside.height == r.events
        seen.append(inside["entity"].unique().sort())
    assert sum(r.events for r in ranges) == events.height
    joined = pl.concat(seen)
    assert joined.is_sorted() and joined.n_unique() == joined.len() == events["patron"].n_unique()
    sizes = [r.events for r in ranges]
    assert max(sizes) < 1.5 * events.height / 5  # about equal events a part
    # The sets of the parts, one after the other, are the sets read whole.
    whole, _ = membership_of(source, None)
    pieces = [membership_of(source, r)[0] for r in ranges]
    assert pl.concat([p.keys for p in pieces]).equals(whole.keys)
    assert np.array_equal(np.concatenate([p.elements for p in pieces]), whole.elements)


def test_parts_are_sized_from_the_budget(tmp_path, demo_events):
    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    source = open_events(src, SPEC)
    counts = entity_counts(source)
    per_event = event_bytes(source)
    assert per_event == 20  # text keys: the one-pass loader's 20 bytes an event (lshjob/ingest/loading.py)
    limit = int(source.events * per_event / 3.5)
    ranges = partitions.key_ranges(counts, limit, event_bytes=per_event)
    assert len(ranges) == 4
    assert all(r.events * per_event <= 1.2 * limit for r in ranges)


def test_jaccard_between_two_set_tables_matches_brute_force():
    # Reference: Python set arithmetic.
    rng = np.random.default_rng(7)

    def table(n):
        sets = [np.unique(rng.integers(0, 30, int(rng.integers(1, 15)))) for _ in range(n)]
        offsets = np.concatenate([[0], np.cumsum([len(s) for s in sets])]).astype(np.int64)
        return sets, ElementSets(pl.Series([], dtype=pl.Int64), offsets, np.concatenate(sets).astype(np.int64))

    a_sets, a = table(60)
    b_sets, b = table(40)
    left = rng.integers(0, 60, 3000)
    right = rng.integers(0, 40, 3000)
    for t in (0.1, 0.3, 0.6):
        got = jaccard_between(a.offsets, a.elements, left, b.offsets, b.elements, right, t)
        for p in range(len(left)):
            x, y = set(a_sets[left[p]].tolist()), set(b_sets[right[p]].tolist())
            j = len(x & y) / len(x | y)
            assert got[p] == (j if j >= t else -1.0)


def test_threshold_one_in_parts_pairs_identical_sets_across_parts(tmp_path):
    # Reference: the one-part run (identical sets grouped exactly) and brute force: every
    # published pair is a pair of identical sets, and every pair of identical sets is published.
    events = loans_with_identical_groups(4, integer_patrons=False)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    one = run_job(src, SPEC, RunOptions(threshold=1.0, top_k=50), tmp_path / "one")
    four = run_job(src, SPEC, RunOptions(threshold=1.0, top_k=50, parts=4), tmp_path / "four")
    assert four["counts"]["parts"] == 4 and four["counts"]["candidate_pairs"] > 0
    assert four["counts"]["representatives"] > one["counts"]["representatives"]  # groups cut by parts
    assert same_index(tmp_path / "one", tmp_path / "four")
    truth = brute_force_pairs(events, 1.0)
    got = published_pairs(tmp_path / "four")
    assert len(truth) > 20 and set(got) == set(truth)


def test_identical_sets_in_different_parts_are_paired_when_their_buckets_are_oversize(tmp_path):
    # Reference: brute force (every pair of identical sets has Jaccard 1 and shares every band)
    # and the one-part run, where identical sets are grouped exactly. Patrons borrowing only
    # the popular title, or it and one other, fill each band's bucket of the lone-title set
    # past --max-bucket 2, so identical sets in different parts never meet through a band.
    patrons, titles = [], []
    for p in range(90):
        held = ["popular"] if p % 15 == 0 else ["popular", f"other-{p}"]
        patrons += [p] * len(held)
        titles += held
    events = pl.DataFrame({"patron": patrons, "title": titles})
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    options = dict(threshold=0.5, perms=32, bands=8, rows=4, top_k=5, max_bucket=2)
    one = run_job(src, SPEC, RunOptions(**options), tmp_path / "one")
    three = run_job(src, SPEC, RunOptions(**options, parts=3), tmp_path / "three")
    # the six lone-title sets: one representative in one part, three in three parts, so three
    # pairs of the same fingerprint across parts, beside the join's candidates
    assert one["counts"]["representatives"] == 85 and three["counts"]["representatives"] == 87
    assert three["counts"]["identical_pairs_across_parts"] == 3
    got = pl.read_parquet(tmp_path / "three/neighbours.parquet")
    lone = list(range(0, 90, 15))
    pairs = got.filter(pl.col("entity").is_in(lone), pl.col("neighbour").is_in(lone))
    assert sorted(zip(pairs["entity"], pairs["neighbour"])) == [(a, b) for a in lone for b in lone if a != b]
    assert set(pairs["jaccard"]) == {1.0} and set(pairs["bands_shared"]) == {8}
    expected = pl.read_parquet(tmp_path / "one/neighbours.parquet").filter(pl.col("jaccard") == 1.0)
    assert got.filter(pl.col("jaccard") == 1.0).equals(expected)


def test_a_planner_sample_emptied_by_min_count_in_parts_gives_the_index_of_one_part(tmp_path):
    # Reference: the one-part run of the same loans. --min-count empties one of the two
    # patrons, so the planner's sample in parts holds a single set: no histogram can be made,
    # and the run goes on (an empty index, with the same warnings) instead of stopping.
    events = pl.DataFrame({"patron": ["p-0", "p-1"], "title": ["t-4", "t-4"], "loans": [0, 3]})
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", count="loans", min_count=1)
    one = run_job(src, spec, RunOptions(threshold=0.3), tmp_path / "one")
    three = run_job(src, spec, RunOptions(threshold=0.3, parts=3), tmp_path / "three")
    assert three["counts"]["parts"] > 1 and three["warnings"] == one["warnings"]
    assert any("only 1 entity" in w for w in one["warnings"])
    assert pl.read_parquet(tmp_path / "three/neighbours.parquet").height == 0
    # The plan then comes from theory, and the run's summary gives the S-curve's chance at the
    # threshold, 1 - (1 - s^r)^b (Leskovec, Rajaraman, Ullman, Mining of Massive Datasets, 3.4.2).
    plan = three["plan"]
    assert plan["mode"] == "theory"
    chance = 1 - (1 - 0.3 ** plan["rows"]) ** plan["bands"]
    assert f"chance of a pair at the threshold {chance:.3f}" in run_report(three)


def test_no_candidate_in_any_part(tmp_path):
    # Disjoint sets: no pair shares a bucket; the run in parts publishes an empty index.
    events = pl.DataFrame({"patron": [f"p{i}" for i in range(50) for _ in range(3)],
                           "title": [f"t{i}-{j}" for i in range(50) for j in range(3)]})
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    manifest = run_job(src, SPEC, RunOptions(threshold=0.5, perms=32, bands=8, rows=4, parts=3), tmp_path / "idx")
    assert manifest["counts"]["candidate_pairs"] == 0
    assert pl.read_parquet(tmp_path / "idx/neighbours.parquet").height == 0


def test_parts_option_is_checked():
    with pytest.raises(ParameterError, match="--parts must be at least 1; got 0"):
        RunOptions(threshold=0.5, parts=0).validate()



def test_the_planner_in_parts_meets_its_recall_target(tmp_path, monkeypatch):
    # Oracle: scipy brute force (test_run.brute_force_pairs). In parts the planner sees a
    # uniform sample of a quarter of the patrons (budget shrunk here), with four times as
    # many sampled patrons; its plan must still find the true pairs at the target recall
    # (0.95 expected; 0.9 allows for the binomial noise of ~1000 pairs).
    events = planted_pairs(1000, 0.3, seed=8, background=2000)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    source = open_events(src, SPEC)
    quarter = int(source.events * event_bytes(source) / 4)
    monkeypatch.setattr(budget.Budget, "range_bytes",
                        lambda self, entities, share=None, reserve=0: 2 * quarter)  # a sample: half a part
    manifest = run_job(src, SPEC, RunOptions(threshold=0.5, sample_size=300, top_k=100, parts=3), tmp_path / "idx")
    sample = manifest["plan"]["sample"]
    assert manifest["counts"]["parts"] == 3
    assert 0.2 * 4000 < sample["entities"] <= 0.3 * 4000 + 1, sample  # about a quarter of the 4000 patrons
    assert "scaled from a uniform sample" in manifest["plan"]["why"]
    truth = brute_force_pairs(events, 0.5)
    got = published_pairs(tmp_path / "idx")
    assert len(truth) > 500
    assert sum(pair in got for pair in truth) / len(truth) >= 0.9


@pytest.mark.parametrize("count", [None, "loans"])
@pytest.mark.parametrize("scheme", ["kperm", "oph"])
@pytest.mark.parametrize("integer_patrons", [False, True])
def test_signing_in_parts_gives_the_same_signatures(tmp_path, integer_patrons, scheme, count):
    # Reference: the same signatures made in one part (themselves checked against datasketch
    # and the documented definition in test_signatures.py). The file is streamed from the
    # parts as they are signed; rows, order, values and metadata must agree.
    from lshjob.jobs.sign import sign_file
    from lshjob.sign.signatures import SignatureParams, read_signatures

    events = loans_with_identical_groups(3, integer_patrons)
    events = events.with_columns(loans=pl.int_range(pl.len()) % 3 + 1)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", count=count, min_count=3 if count else 1)
    params = SignatureParams(scheme=scheme, perms=32, seed=5)
    one = sign_file(src, tmp_path / "one.parquet", spec, params)
    three = sign_file(src, tmp_path / "three.parquet", spec, params, parts=3)
    assert one["parts"] == 1 and three["parts"] == 3
    assert three["signatures"] == one["signatures"] and three["ingest"] == one["ingest"]
    a, meta_a = read_signatures(tmp_path / "one.parquet")
    b, meta_b = read_signatures(tmp_path / "three.parquet")
    assert a.height > 900 and a.equals(b)
    assert {k: v for k, v in meta_a.items() if k != "path"} == {k: v for k, v in meta_b.items() if k != "path"}
    assert not list(tmp_path.glob(".*"))  # the parts' folder is gone


def test_an_error_while_making_a_range_reaches_the_caller_and_nothing_is_written(tmp_path):
    # The writer pulls the ranges' tables through polars; an error in the second range must
    # come out as the error raised (not polars' wrapping of it), and leave no file behind.
    from lshjob.errors import InputError
    from lshjob.sign.signatures import signature_column
    from lshjob.sign.streaming import write_streamed

    table = pl.DataFrame({"entity": [1, 2]}).with_columns(
        signature_column(np.ones((2, 4), dtype=np.uint64)), pl.Series("set_size", [3, 4], dtype=pl.UInt32))

    def ranges():
        yield table
        raise InputError("loans.parquet: column 'patron' changed while being read")

    with pytest.raises(InputError, match="column 'patron' changed"):
        write_streamed(ranges(), tmp_path / "out.parquet", {"scheme": "kperm"})
    assert not list(tmp_path.iterdir())
    assert write_streamed(iter([table, table.with_columns(entity=pl.Series([3, 4]))]),
                           tmp_path / "out.parquet", {"scheme": "kperm"}) == 4
    assert pl.read_parquet(tmp_path / "out.parquet")["entity"].to_list() == [1, 2, 3, 4]


@pytest.mark.parametrize("weighted", [False, True])
def test_signing_turns_to_parts_when_the_sets_would_not_fit(tmp_path, monkeypatch, weighted):
    # The signatures are streamed to the file a slice at a time and only the sets count:
    # 58,199 events x 20 bytes (36 weighted) = 1.2 MB (2.1 MB), more than half of the budget
    # once that half (of what the slices leave: 1GiB - 4 x 64k x 2 KB = 512 MiB) is shrunk to
    # 1 MB here. So the signing goes in parts by itself, and the CLI says so. Budgets below
    # what the process itself takes are refused.
    from typer.testing import CliRunner

    from lshjob.cli.app import app

    src = tmp_path / "loans.parquet"
    planted_pairs(800, 0.3, seed=1, background=800).with_columns(loans=pl.lit(1)).write_parquet(src)
    args = ["sign", str(src), "--entity", "patron", "--element", "title", "--perms", "256", "--json", "--quiet"]
    args += ["--count", "loans"] if weighted else []
    whole = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "whole.parquet")])
    monkeypatch.setattr(budget, "ONE_PART_SHARE", 1e6 / 2**29)
    monkeypatch.setattr(budget.Budget, "range_bytes", lambda self, entities, share=None, reserve=0: 500_000)
    small = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "small.parquet"), "--memory", "1GiB"])
    assert whole.exit_code == 0 and small.exit_code == 0, small.output
    assert json.loads(whole.output)["parts"] == 1 and json.loads(small.output)["parts"] > 1
    assert pl.read_parquet(tmp_path / "whole.parquet").equals(pl.read_parquet(tmp_path / "small.parquet"))
    bad = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "x.parquet"), "--parts", "0"])
    assert bad.exit_code != 0 and "--parts must be at least 1; got 0" in bad.output
    short = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "x.parquet"), "--memory", "800MB"])
    assert short.exit_code != 0 and "a key range at a time needs at least 1GiB" in short.output
    tiny = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "x.parquet"), "--memory", "300MB"])
    assert tiny.exit_code != 0 and "--memory must be at least 512MiB; got '300MB'" in tiny.output
    assert not (tmp_path / "x.parquet").exists()


def test_the_run_summary_says_it_went_in_parts(tmp_path, demo_events):
    from typer.testing import CliRunner

    from lshjob.cli.app import app

    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    args = ["run", str(src), "--entity", "patron", "--element", "title", "--threshold", "0.5"]
    parted = CliRunner().invoke(app, [*args, "--parts", "2", "--out", str(tmp_path / "a")])
    whole = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "b")])
    assert parted.exit_code == 0 and whole.exit_code == 0, parted.output
    assert "read in 2 parts (key ranges, one at a time" in parted.output
    assert "parts" not in whole.output


@pytest.mark.parametrize("integer_patrons", [False, True])
def test_an_audit_in_parts_reports_what_the_audit_in_one_part_does(tmp_path, integer_patrons):
    # Reference: the audit holding every set (itself checked against brute force and a planted
    # wrong pair in test_run.py). In parts, each pair is found in the part of its other
    # entity; identical sets spread over parts must still count as one set.
    from lshjob.audit.check import audit_index

    events = loans_with_identical_groups(6, integer_patrons)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    run_job(src, SPEC, RunOptions(threshold=0.4, perms=64, bands=16, rows=4, top_k=30), tmp_path / "idx")
    one = audit_index(tmp_path / "idx", sample=300, parts=1)
    three = audit_index(tmp_path / "idx", sample=300, parts=3)
    assert one["parts"] == 1 and three["parts"] == 3
    assert one["true_pairs"] > 100 and one["found"] > 0
    apart = ("parts", "peak_memory_bytes")
    assert {k: v for k, v in three.items() if k not in apart} == {k: v for k, v in one.items() if k not in apart}


@pytest.mark.parametrize("keep", ["entity", "entity,segment"])
def test_merging_in_parts_gives_the_same_rows(tmp_path, demo_events, keep, monkeypatch):
    # Reference: the merge holding every row (itself checked against signing the union in
    # test_signatures.py). Two files (by month and branch), a window, folded by entity
    # ranges; same rows, same order, same metadata.
    from lshjob.jobs.sign import merge_files, sign_file
    from lshjob.sign.signatures import SignatureParams, read_signatures

    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    params = SignatureParams(perms=32, seed=3)
    spec = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month")
    sign_file(src, tmp_path / "a.parquet", spec, params)
    sign_file(src, tmp_path / "b.parquet", EventSpec(entity="patron", element="title", segment="branch",
                                                     time="borrowed_at", period="week"), params)
    keys = keep.split(",")
    files = [tmp_path / "a.parquet", tmp_path / "b.parquet"]
    one = merge_files(files, tmp_path / "one.parquet", keys, since="2026-03-01", until="2026-10-31", parts=1)
    four = merge_files(files, tmp_path / "four.parquet", keys, since="2026-03-01", until="2026-10-31", parts=4)
    assert one["parts"] == 1 and four["parts"] == 4
    assert four["rows_in"] == one["rows_in"] and four["rows_out"] == one["rows_out"] > 500
    a, meta_a = read_signatures(tmp_path / "one.parquet")
    b, meta_b = read_signatures(tmp_path / "four.parquet")
    assert a.equals(b)
    assert {k: v for k, v in meta_a.items() if k != "path"} == {k: v for k, v in meta_b.items() if k != "path"}
    assert not list(tmp_path.glob(".*"))
    # The budget decides when no part count is given: shrunk here, the merge goes in parts.
    monkeypatch.setattr(budget, "ONE_PART_SHARE", 1e-9)
    monkeypatch.setattr(budget.Budget, "range_bytes", lambda self, entities, share=None, reserve=0: 300_000)
    auto = merge_files(files, tmp_path / "auto.parquet", keys, since="2026-03-01", until="2026-10-31")
    assert auto["parts"] > 1 and pl.read_parquet(tmp_path / "auto.parquet").equals(a)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("integer_patrons", [False, True])
def test_signing_segments_and_periods_in_parts(tmp_path, demo_events, monkeypatch, weighted, integer_patrons):
    # Oracle: sign_element_lists (the reference signer, checked against datasketch in
    # test_signatures.py) over each (patron, branch, month)'s titles, grouped here by polars
    # from the raw loans. In three key ranges, and in ranges chosen by a budget the sets do
    # not fit, the file must hold exactly those signatures in key order, with the counts of
    # signing in one part; weighted (--count, --min-count 2), some sets are emptied.
    from helpers import sign_element_lists
    from typer.testing import CliRunner

    from lshjob import load_sets
    from lshjob.cli.app import app
    from lshjob.ingest import keyed
    from lshjob.ingest.spec import validated_events
    from lshjob.jobs.sign import sign_file
    from lshjob.sign.signatures import SignatureParams, read_signatures, signature_array

    events = demo_events[0]
    if integer_patrons:
        events = events.with_columns(patron=pl.col("patron").str.slice(1).cast(pl.Int64) * 7)
    src = tmp_path / "loans.parquet"
    events.write_parquet(src)
    spec = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month",
                     count="loans" if weighted else None, min_count=2 if weighted else 1)
    params = SignatureParams(scheme="oph", perms=32, seed=4)

    composite = []  # integer patrons go through the streaming loader by composite keys
    real = keyed.keyed_source
    monkeypatch.setattr(keyed, "keyed_source", lambda *a: composite.append(1) or real(*a))
    one = sign_file(src, tmp_path / "one.parquet", spec, params)
    three = sign_file(src, tmp_path / "three.parquet", spec, params, parts=3)
    assert (real(*validated_events(src, spec), spec) is not None) == integer_patrons and len(composite) == 2
    # the counts and emptied examples polars' group-by reports (the path text patrons take)
    assert one["ingest"] == {**load_sets(src, spec)[1].as_dict(), "files": [str(src)]}

    kept = (events.with_columns(period=pl.col("borrowed_at").dt.truncate("1mo").dt.date())
            .group_by("patron", "branch", "period", "title").agg(pl.col("loans").sum() if weighted else pl.len())
            .filter(pl.col("loans" if weighted else "len") >= (2 if weighted else 1)))
    truth = kept.group_by("patron", "branch", "period").agg("title").sort("patron", "branch", "period")
    table, _ = read_signatures(tmp_path / "three.parquet")
    assert one["parts"] == 1 and three["parts"] == 3 and three["ingest"] == one["ingest"]
    assert table.select("entity", "segment", "period").rows() == truth.select("patron", "branch", "period").rows()
    assert np.array_equal(signature_array(table), sign_element_lists(truth["title"].to_list(), params))
    assert table["set_size"].to_list() == truth["title"].list.len().to_list()
    assert read_signatures(tmp_path / "one.parquet")[0].equals(table)
    assert (one["ingest"]["empty_after_filter"] > 0) == weighted

    # 23k loans do not fit half of a budget shrunk to 0.1 MB: parts of 0.5 MB (polars' group-by
    # at 256 bytes an event; by composite keys, the loader's bytes an event and 40 a set)
    monkeypatch.setattr(budget, "ONE_PART_SHARE", 1e5 / 2**29)
    monkeypatch.setattr(budget.Budget, "range_bytes", lambda self, entities, share=None, reserve=0: 500_000)
    args = ["sign", str(src), "--entity", "patron", "--element", "title", "--segment", "branch", "--time",
            "borrowed_at", "--period", "month", "--scheme", "oph", "--perms", "32", "--seed", "4", "--json",
            "--quiet", "--memory", "1GiB", "--out", str(tmp_path / "small.parquet")]
    args += ["--count", "loans", "--min-count", "2"] if weighted else []
    small = CliRunner().invoke(app, args)
    assert small.exit_code == 0, small.output
    if integer_patrons:  # the loader's bytes an event (module docstring) and 40 a set
        sets = events.select("patron", "branch", pl.col("borrowed_at").dt.truncate("1mo")).n_unique()
        cost = events.height * budget.BYTES_PER_EVENT[weighted] + sets * budget.SIGNATURE_BYTES_PER_ENTITY
    else:
        cost = events.height * budget.KEYED_BYTES_PER_EVENT
    assert json.loads(small.output)["parts"] == -(-cost // 500_000)
    assert read_signatures(tmp_path / "small.parquet")[0].equals(table)


def test_signing_segments_in_parts_with_nothing_left_is_an_error_and_writes_nothing(tmp_path, demo_events):
    # Every range emptied by --min-count: the same error as in one part, and no file.
    from lshjob.errors import InputError
    from lshjob.jobs.sign import sign_file

    src = tmp_path / "loans.parquet"
    demo_events[0].write_parquet(src)
    spec = EventSpec(entity="patron", element="title", segment="branch", count="loans", min_count=10**6)
    with pytest.raises(InputError, match="no element is left after filtering"):
        sign_file(src, tmp_path / "sig.parquet", spec, parts=3)
    assert not list(tmp_path.glob("sig*")) and not list(tmp_path.glob(".*"))
