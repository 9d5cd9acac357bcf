"""The whole job (lshjob run): recall against brute force, exactness, skew, edge cases."""

import json
import os
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import scipy.sparse as sp
from helpers import planted_pairs, same_index
from typer.testing import CliRunner

import lshjob
from lshjob import EventSpec, ParameterError
from lshjob.audit.check import audit_index
from lshjob.cli.app import app
from lshjob.index.conformance import reference_bucket_rows, reference_candidates
from lshjob.index.sqlfiles import load_sql, sql_dir
from lshjob.jobs import crowd_caps
from lshjob.jobs.run import RunOptions, run_job
from lshjob.plan.banding import candidate_probability

SPEC = EventSpec(entity="patron", element="title")


def brute_force_pairs(events: pl.DataFrame, threshold: float) -> dict[tuple[str, str], float]:
    """Oracle: exact Jaccard of every pair from a scipy sparse product (reference library)."""
    ents = events["patron"].unique().sort()
    elems = events["title"].unique().sort()
    rows = ents.search_sorted(events["patron"]).to_numpy()
    cols = elems.search_sorted(events["title"]).to_numpy()
    x = sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(ents), len(elems)))
    x.sum_duplicates()
    x.data[:] = 1.0  # repeated events count once
    inter = (x @ x.T).tocoo()
    sizes = np.asarray(x.sum(axis=1)).ravel()
    keep = inter.row < inter.col
    r, c, v = inter.row[keep], inter.col[keep], inter.data[keep]
    jac = v / (sizes[r] + sizes[c] - v)
    names = ents.to_list()
    return {(names[a], names[b]): float(j) for a, b, j in zip(r, c, jac) if j >= threshold}


def published_pairs(out: Path) -> dict[tuple[str, str], float]:
    table = pl.read_parquet(out / "neighbours.parquet")
    return {(min(a, b), max(a, b)): j for a, b, j in table.select("entity", "neighbour", "jaccard").iter_rows()}


def write(events: pl.DataFrame, tmp_path: Path) -> Path:
    path = tmp_path / "loans.parquet"
    events.write_parquet(path)
    return path


def test_recall_matches_the_s_curve_and_pairs_are_exact(tmp_path):
    # Oracle: scipy brute force; prediction: mean of 1-(1-J^r)^b over the true pairs (MMDS 3.4).
    events = planted_pairs(1500, 0.3, seed=4)
    src = write(events, tmp_path)
    t, b, r = 0.5, 20, 5
    manifest = run_job(src, SPEC, RunOptions(threshold=t, perms=128, bands=b, rows=r, top_k=500), tmp_path / "idx")
    truth = brute_force_pairs(events, t)
    got = published_pairs(tmp_path / "idx")
    assert len(truth) > 800
    measured = sum(pair in got for pair in truth) / len(truth)
    predicted = float(np.mean(candidate_probability(np.array(list(truth.values())), b, r)))
    assert abs(measured - predicted) < 0.03, (measured, predicted)
    for pair, jac in got.items():  # every published pair is a true pair with its exact Jaccard
        assert pair in truth and abs(jac - truth[pair]) <= 1e-12
    assert manifest["plan"]["mode"] == "explicit" and manifest["counts"]["verified_pairs"] == len(got)


def test_data_mode_plan_meets_its_recall_target(tmp_path):
    # Oracle: scipy brute force. The planner aims at expected recall 0.95; allow 0.03 below.
    events = planted_pairs(1200, 0.4, seed=9)
    src = write(events, tmp_path)
    manifest = run_job(src, SPEC, RunOptions(threshold=0.6, top_k=500, sample_size=3000), tmp_path / "idx")
    truth = brute_force_pairs(events, 0.6)
    got = published_pairs(tmp_path / "idx")
    measured = sum(p in got for p in truth) / len(truth)
    assert manifest["plan"]["mode"] == "data"
    assert measured >= manifest["plan"]["predicted"]["expected_recall"] - 0.03


def test_neighbour_table_contract(tmp_path, demo_events):
    events, _ = demo_events
    src = write(events, tmp_path)
    run_job(src, SPEC, RunOptions(threshold=0.4, top_k=7), tmp_path / "idx")
    table = pl.read_parquet(tmp_path / "idx" / "neighbours.parquet")
    assert table.columns == ["entity", "neighbour", "jaccard", "estimate", "bands_shared", "rank"]
    assert table.filter(pl.col("entity") == pl.col("neighbour")).height == 0
    per = table.group_by("entity").agg(pl.col("rank"), pl.col("jaccard"), pl.len())
    for ranks, jacs, n in per.select("rank", "jaccard", "len").iter_rows():
        assert n <= 7 and ranks == list(range(1, n + 1)) and jacs == sorted(jacs, reverse=True)
    assert table.select(pl.col("jaccard") >= 0.4).to_series().all()
    assert table.select(pl.col("bands_shared") >= 1).to_series().all()


def test_same_input_twice_gives_identical_index(tmp_path, demo_events):
    events, _ = demo_events
    src = write(events, tmp_path)
    for name in ("a", "b"):
        run_job(src, SPEC, RunOptions(threshold=0.5), tmp_path / name)
    assert same_index(tmp_path / "a", tmp_path / "b")


def test_skew_trap_and_identical_groups_do_not_blow_up(tmp_path):
    # 5000 patrons whose only loan is one bestseller: 12.5 million identical pairs if paired naively.
    trap = pl.DataFrame({"patron": [f"S{i:05d}" for i in range(5000)], "title": ["T0"] * 5000})
    singles = pl.DataFrame({"patron": ["x1", "x2", "x3"], "title": ["T0", "T9", "T9"]})
    events = pl.concat([trap, singles, planted_pairs(50, 0.6, seed=1, background=0)])
    src = write(events, tmp_path)
    m = run_job(src, SPEC, RunOptions(threshold=0.5, top_k=5), tmp_path / "idx")
    # The trap and x1 ({T0}) collapse into one, x2 and x3 ({T9}) into another, plus 100 planted.
    assert m["counts"]["representatives"] == 1 + 1 + 100
    assert m["counts"]["candidate_pairs"] < 1000
    assert m["seconds"]["total"] < 60
    table = pl.read_parquet(tmp_path / "idx/neighbours.parquet")
    trap_rows = table.filter(pl.col("entity").str.starts_with("S"))
    assert trap_rows.height == 5000 * 5 and (trap_rows["jaccard"] == 1.0).all()
    x2 = table.filter(pl.col("entity") == "x2").select("neighbour", "jaccard").rows()
    assert x2 == [("x3", 1.0)]  # single-element sets: identical pair found, nothing else qualifies


@pytest.mark.parametrize("reserve", [False, True], ids=["skipped", "held-in-reserve"])
def test_oversize_buckets_are_split_and_counted(tmp_path, monkeypatch, reserve):
    # 40 patrons sharing 20 titles, each with 5 of their own (every pair J = 20/30): with
    # 16 bands of 4 rows many buckets hold more than the cap of 10. Oracle for the counts
    # and pairs: every bucket row from the key definition, pairs per bucket and per
    # sub-bucket of oversize ones by brute force (lshjob.index.conformance.reference_candidates).
    # Held in reserve, oversize buckets may be compared whole: the pairs lie between those of
    # the cap and those of every bucket (the same oracle without a cap).
    if not reserve:
        monkeypatch.setattr(crowd_caps, "RESERVE_MEMBERS", 0)
    rows = ([(f"p{i:02d}", f"c{j}") for i in range(40) for j in range(20)]
            + [(f"p{i:02d}", f"u{i}-{j}") for i in range(40) for j in range(5)])
    events = pl.DataFrame(rows, schema=["patron", "title"], orient="row")
    src = write(events, tmp_path)
    m = run_job(src, SPEC, RunOptions(threshold=0.6, perms=64, bands=16, rows=4, max_bucket=10, top_k=100),
                tmp_path / "idx")
    from lshjob.sign.signatures import SignatureParams, signature_array
    from lshjob.sign.slices import sign_sets

    sets = lshjob.load_sets(src, SPEC)[0]
    matrix = signature_array(sign_sets(sets, ["entity"], SignatureParams(perms=64, seed=1)))
    pairs, skew = reference_candidates(reference_bucket_rows(matrix, np.arange(40), 16, 4), 16, 10)
    assert skew["oversize_buckets"] > 0 and skew["split_pairs"] > 0
    assert m["skew"] == skew
    names = sorted(f"p{i:02d}" for i in range(40))
    capped = {(names[a], names[b]): 20 / 30 for a, b in pairs}
    got = published_pairs(tmp_path / "idx")
    if not reserve:
        assert got == capped and "oversize_buckets_compared" not in m["counts"]
    else:
        every = reference_candidates(reference_bucket_rows(matrix, np.arange(40), 16, 4), 16, 10**6)[0]
        assert m["counts"]["oversize_buckets_compared"] > 0
        assert capped.items() < got.items() <= {(names[a], names[b]): 20 / 30 for a, b in every}.items()


def test_threshold_one_pairs_identical_sets_only(tmp_path):
    events = pl.DataFrame({"patron": ["a", "a", "b", "b", "c", "c"], "title": ["x", "y", "x", "y", "x", "z"]})
    m = run_job(write(events, tmp_path), SPEC, RunOptions(threshold=1.0), tmp_path / "idx")
    assert m["plan"]["mode"] == "identical-only"
    assert published_pairs(tmp_path / "idx") == {("a", "b"): 1.0}


def test_threshold_near_zero_is_handled_when_affordable(tmp_path):
    # Oracle: scipy brute force; at t=0.01 on 300 patrons every overlapping pair qualifies.
    events = planted_pairs(50, 0.2, seed=2, background=200)
    src = write(events, tmp_path)
    run_job(src, SPEC, RunOptions(threshold=0.01, top_k=1000), tmp_path / "idx")
    truth = brute_force_pairs(events, 0.01)
    got = published_pairs(tmp_path / "idx")
    assert sum(p in got for p in truth) / len(truth) > 0.95


def test_threshold_near_zero_is_refused_when_too_costly(tmp_path, demo_events):
    src = write(demo_events[0], tmp_path)
    with pytest.raises(ParameterError, match="predicts .* candidate pairs .* --max-candidates"):
        run_job(src, SPEC, RunOptions(threshold=0.01, max_candidates=1e4), tmp_path / "idx")
    assert not (tmp_path / "idx" / "neighbours.parquet").exists()


def test_failed_rerun_keeps_the_last_good_index(tmp_path, demo_events, monkeypatch):
    src = write(demo_events[0], tmp_path)
    out = tmp_path / "idx"
    run_job(src, SPEC, RunOptions(threshold=0.5), out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}

    def broken(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr("lshjob.index.verify.local.verify_between", broken)
    with pytest.raises(RuntimeError):
        run_job(src, SPEC, RunOptions(threshold=0.6), out)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before  # no staging or work left
    monkeypatch.undo()
    run_job(src, SPEC, RunOptions(threshold=0.6), out)
    assert (out / "previous" / "neighbours.parquet").read_bytes() == before["neighbours.parquet"]
    assert json.loads((out / "manifest.json").read_text())["options"]["threshold"] == 0.6


def test_manifest_records_inputs_plan_counts_timings_memory(tmp_path, demo_events):
    src = write(demo_events[0], tmp_path)
    m = run_job(src, SPEC, RunOptions(threshold=0.5), tmp_path / "idx")
    saved = json.loads((tmp_path / "idx/manifest.json").read_text())
    assert saved["inputs"]["rows"] == demo_events[0].height
    # The input digest (computed in a thread during the run): sha256 over each file's own
    # sha256 in hex and a newline (hashlib as reference).
    import hashlib

    own = hashlib.sha256(src.read_bytes()).hexdigest()
    expected = hashlib.sha256((own + "\n").encode()).hexdigest()
    assert saved["inputs"]["sha256"] == expected and saved["inputs"]["bytes"] == src.stat().st_size
    for stage in ("ingest", "sign", "plan", "band", "join", "verify", "publish"):
        assert saved["seconds"][stage] >= 0 and saved["peak_memory_bytes"][stage] > 0
    assert saved["plan"]["why"] and saved["versions"]["duckdb"]
    assert saved["output"]["sha256"] == m["output"]["sha256"]
    assert hashlib.sha256((tmp_path / "idx/neighbours.parquet").read_bytes()).hexdigest() == saved["output"]["sha256"]


def test_audit_reports_recall_and_catches_a_wrong_pair(tmp_path):
    events = planted_pairs(400, 0.4, seed=3, background=300)
    src = write(events, tmp_path)
    run_job(src, SPEC, RunOptions(threshold=0.5, top_k=100), tmp_path / "idx")
    report = audit_index(tmp_path / "idx", sample=400)
    assert report["wrong_pairs"] == 0 and report["recall"] >= 0.9
    assert abs(report["recall"] - report["predicted_recall"]) < 0.05
    # No identical sets here: distinct set pairs are the unordered true pairs seen.
    assert report["true_pairs"] / 2 <= report["distinct_set_pairs"] <= report["true_pairs"]
    assert abs(report["distinct_recall"] - report["distinct_predicted"]) < 4 * report["distinct_se"] + 0.01
    path = tmp_path / "idx/neighbours.parquet"
    table = pl.read_parquet(path)
    table.with_columns(pl.when(pl.int_range(pl.len()) == 0).then(0.99).otherwise(pl.col("jaccard"))
                       .alias("jaccard")).write_parquet(path)
    # recorded in the manifest as a publish would (a changed file alone fails the sha256 check)
    import hashlib

    manifest = json.loads((tmp_path / "idx/manifest.json").read_text())
    manifest["output"]["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    (tmp_path / "idx/manifest.json").write_text(json.dumps(manifest))
    result = CliRunner().invoke(app, ["audit", str(tmp_path / "idx"), "--sample", "1100", "--json"])
    assert result.exit_code == 1 and json.loads(result.stdout)["wrong_pairs"] >= 1


def test_config_file_and_flags(tmp_path, demo_events):
    src = write(demo_events[0], tmp_path)
    config = tmp_path / "nightly.toml"
    config.write_text(f'events = "{src}"\nentity = "patron"\nelement = "title"\nthreshold = 0.5\n'
                      f'out = "{tmp_path / "idx"}"\ntop-k = 3\n')
    result = CliRunner().invoke(app, ["run", "--config", str(config), "--top-k", "2", "--json", "--quiet"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["options"]["top_k"] == 2 and summary["options"]["threshold"] == 0.5
    config.write_text('threshold = 0.5\nthreshhold = 0.4\n')
    result = CliRunner().invoke(app, ["run", "--config", str(config)])
    assert result.exit_code == 2 and "unknown key 'threshhold'" in result.stderr


def test_sql_ships_with_the_package():
    # The SQL lives inside the package (lshjob/index/sql) and is read with importlib.resources;
    # CI sets LSHJOB_EXPECT_INSTALLED=1 and runs the suite against a plain (non-editable) install.
    folder = sql_dir()
    names = {p.name for p in folder.iterdir()}
    assert {"candidates.sql", "bucket_skew.sql", "split_oversize.sql"} <= names
    assert "SELECT" in load_sql("candidates").upper()
    if os.environ.get("LSHJOB_EXPECT_INSTALLED") == "1":
        package = Path(lshjob.__file__).resolve().parent
        assert "site-packages" in str(package)
        assert Path(str(folder)) == package / "index" / "sql"


def test_explicit_bands_and_rows_are_checked(tmp_path, small_events):
    with pytest.raises(ParameterError, match="20 x 7 = 140 > 128"):
        run_job(small_events, SPEC, RunOptions(threshold=0.5, perms=128, bands=20, rows=7), tmp_path / "idx")
    with pytest.raises(ParameterError, match="--bands and --rows go together"):
        run_job(small_events, SPEC, RunOptions(threshold=0.5, bands=20), tmp_path / "idx")
    assert not (tmp_path / "idx").exists()


def test_verifying_in_slices_gives_the_same_index(tmp_path, demo_events, monkeypatch):
    src = write(demo_events[0], tmp_path)
    run_job(src, SPEC, RunOptions(threshold=0.4), tmp_path / "whole")
    monkeypatch.setattr("lshjob.runtime.budget.MIN_VERIFY_SLICE", 50)
    monkeypatch.setattr("lshjob.runtime.budget.VERIFY_BYTES_PER_PAIR", 10**12)
    import lshjob.index.verify.local

    slices = []
    real = lshjob.index.verify.local.verify_between
    monkeypatch.setattr("lshjob.index.verify.local.verify_between",
                        lambda chunk, *a: slices.append(chunk.height) or real(chunk, *a))
    m = run_job(src, SPEC, RunOptions(threshold=0.4), tmp_path / "sliced")
    assert m["counts"]["candidate_pairs"] > 500  # many slices of 50
    assert max(slices) == 50 and sum(slices) == m["counts"]["candidate_pairs"]
    assert same_index(tmp_path / "whole", tmp_path / "sliced")


def test_a_budget_too_small_for_the_sets_is_refused_before_reading(tmp_path, demo_events):
    # The loader needs 20 bytes an event (lshjob/ingest/loading.py); a budget below that is refused
    # with the figures, naming the input.
    from lshjob import ParameterError
    from lshjob.ingest.loading import load_membership

    src = write(demo_events[0], tmp_path)
    n = demo_events[0].height
    with pytest.raises(ParameterError, match=rf"{src}: grouping {n:,} events into sets needs about"):
        load_membership(src, SPEC, memory=20 * n - 1)
    sets, _ = load_membership(src, SPEC, memory=20 * n)
    assert sets.size > 0


def test_a_run_never_enters_the_parallel_runtime_from_two_threads(tmp_path, demo_events):
    # Reference: numba's documentation of threading layers: `workqueue` is not thread-safe
    # and terminates the process on concurrent parallel launches. The run starts numba in a
    # background thread (joined before any other compiled call) and searches bands in a
    # thread pool (serial kernels only); under that layer it must finish and give the same
    # index as under the default one. A parallel kernel called from the pool would abort it.
    import os
    import subprocess
    import sys

    src = write(demo_events[0], tmp_path)
    outs = {}
    for layer in ("workqueue", None):
        env = dict(os.environ)
        if layer:
            env["NUMBA_THREADING_LAYER"] = layer
        out = tmp_path / f"idx-{layer}"
        done = subprocess.run(
            [sys.executable, "-m", "lshjob.cli.app", "run", str(src), "--entity", "patron", "--element", "title",
             "--threshold", "0.5", "--out", str(out), "--quiet"],
            env=env, capture_output=True, text=True, timeout=300,
        )
        assert done.returncode == 0, done.stderr[-2000:]
        outs[layer] = pl.read_parquet(out / "neighbours.parquet")
    assert outs["workqueue"].equals(outs[None])
