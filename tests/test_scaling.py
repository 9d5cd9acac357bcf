"""The forecast scaled from runs of a sample (lshjob/plan/scaling.py): distinct sets at full
size, the pairs of the sample's buckets against the join's own count and against the exact
count at full size, fixed seconds kept out of the scaling, and lshjob plan scaling real runs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob.cli.app import app
from lshjob.ingest.loading import load_membership
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.calibrate import calibration_events
from lshjob.jobs.options import default_of
from lshjob.jobs.run import RunOptions, run_job
from lshjob.jobs.sample_profile import sample_profile
from lshjob.plan import cost
from lshjob.plan.cost import Workload
from lshjob.plan.scaling import fixed_and_rate, project_counts, shlosser_distinct

runner = CliRunner()
SPEC = EventSpec(entity="entity", element="element")


@pytest.fixture(autouse=True)
def own_cache(tmp_path, monkeypatch):
    """No calibration of the user running the tests is read."""
    monkeypatch.delenv(cost.MODEL_ENV, raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))


def test_shlosser_counts_distinct_values_of_the_whole_from_a_tenth():
    # Oracle: algebra for a population of distinct values only (a Bernoulli sample of a share
    # q holds each value once: d / q exactly), and the exact distinct count of a skewed
    # population (Python set) for the estimate from a 10% sample.
    assert shlosser_distinct(np.ones(500, dtype=np.int64), 0.1) == pytest.approx(5000)
    rng = np.random.default_rng(11)
    n = 50_000
    population = np.where(rng.random(n) < 0.4, rng.zipf(1.5, n) % 2000, 10**6 + np.arange(n))
    truth = len(set(population.tolist()))
    for seed in (5, 6):
        picked = population[np.random.default_rng(seed).random(n) < 0.1]
        _, multiplicities = np.unique(picked, return_counts=True)
        estimate = shlosser_distinct(multiplicities, len(picked) / n)
        assert abs(estimate / truth - 1) < 0.1, (estimate, truth)


def _frame(n: int, seed: int, titles: int) -> pl.DataFrame:
    return calibration_events(n, seed, titles)  # sets of uniform titles, a tenth near-copies


def test_the_sample_profile_counts_the_pairs_the_join_counts(tmp_path):
    # Oracle: the DuckDB join of a real run of the same sets under the same plan (its skew
    # report: pairs of written buckets plus pairs of oversize ones, a pair once per band).
    events = tmp_path / "events.parquet"
    _frame(3000, 3, 1500).write_parquet(events)
    m = run_job(events, SPEC, RunOptions(threshold=0.5, perms=64, bands=16, rows=4), tmp_path / "idx")
    sets, _ = load_membership(events, SPEC)
    profile = sample_profile(sets, 64, 16, 4)
    assert profile.representatives == m["counts"]["representatives"]
    assert profile.pair_rows()[0] == m["skew"]["bucket_pairs"] + m["skew"]["oversize_pairs"]


def _repeating_sets(n: int, seed: int) -> pl.DataFrame:
    """35% of the entities hold one of 300 small sets of popular titles (Zipf-weighted), the
    others a few popular titles and 2-11 of 2,900 others: many identical sets collapse."""
    rng = np.random.default_rng(seed)
    popular = [rng.choice(60, size=rng.integers(1, 4), replace=False) for _ in range(300)]
    weights = 1.0 / np.arange(1, 301) ** 1.1
    weights /= weights.sum()
    entity, element = [], []
    for e in range(n):
        if rng.random() < 0.35:
            held = popular[rng.choice(300, p=weights)]
        else:
            held = np.unique(np.concatenate([rng.choice(60, size=rng.integers(0, 3)),
                                             rng.integers(100, 3000, rng.integers(2, 12))]))
        entity += [e] * len(held)
        element += held.tolist()
    return pl.DataFrame({"entity": entity, "element": element})


def _whole_and_tenth(frame: pl.DataFrame, folder):
    """``frame`` written whole, and a uniform 10% sample of its entities (seeded)."""
    full_path, part_path = folder / "full.parquet", folder / "part.parquet"
    frame.write_parquet(full_path)
    picked = frame["entity"].unique().sample(fraction=0.1, seed=9)
    frame.filter(pl.col("entity").is_in(picked.implode())).write_parquet(part_path)
    return full_path, part_path


def test_pairs_projected_from_a_tenth_match_the_full_count(tmp_path):
    # Oracle: the exact pair rows of the whole population under the same plan (every bucket of
    # every band counted) and its exact distinct sets, against the projection from a uniform
    # 10% sample of the entities. Scaling the sample's pairs by the square of the entities
    # overshoots (repeated sets collapse: their pairs do not grow); the projection must not.
    frame = _repeating_sets(20_000, 4)
    full_path, part_path = _whole_and_tenth(frame, tmp_path)
    full_sets, _ = load_membership(full_path, SPEC)
    part_sets, _ = load_membership(part_path, SPEC)
    truth = sample_profile(full_sets, 64, 32, 2)
    profile = sample_profile(part_sets, 64, 32, 2)
    projected = project_counts(profile, [], {"perms": 64, "bands": 32}, full_sets.size, len(full_sets.elements),
                               1.0, "kperm", 50, max_bucket=10**9)
    assert projected.facts["pair_rows"] == pytest.approx(truth.pair_rows()[0], rel=0.2)
    assert projected.workload.representatives == pytest.approx(truth.representatives, rel=0.1)
    naive = profile.pair_rows()[0] * (full_sets.size / part_sets.size) ** 2
    assert naive > 1.5 * truth.pair_rows()[0]
    # buckets over max_bucket at full size are left out of the kept pairs
    largest = projected.facts["pair_rows"] - project_counts(
        profile, [], {"perms": 64, "bands": 32}, full_sets.size, len(full_sets.elements), 1.0, "kperm", 50,
        max_bucket=200).facts["pair_rows_kept"]
    assert largest > 0


def test_fixed_seconds_are_the_intercept_and_are_not_scaled():
    # Oracle: algebra. Seconds made exactly from 0.5 + 2e-7 x driver at two sizes give back
    # 0.5 and 2e-7; a smaller run slower than the larger (noise) keeps the fixed part at half
    # the larger run's seconds, so the rest still scales.
    fixed, rate = fixed_and_rate([1e6, 4e6], [0.5 + 0.2, 0.5 + 0.8], 0.0)
    assert fixed == pytest.approx(0.5) and rate == pytest.approx(2e-7)
    fixed, rate = fixed_and_rate([1e6, 4e6], [3.0, 2.0], 0.0)
    assert fixed == pytest.approx(1.0) and rate == pytest.approx(1.0 / 4e6)
    fixed, _ = fixed_and_rate([4e6], [2.0], 0.3)  # one run: the model's constant
    assert fixed == pytest.approx(0.3)


def test_plan_scales_the_runs_of_its_sample(tmp_path):
    # Oracle: the full run's own measured counts (its manifest), against the forecast scaled
    # from two runs of nested samples (a quarter, a sixteenth) of its entities.
    frame = _frame(4000, 6, 2000)
    full = tmp_path / "full.parquet"
    frame.write_parquet(full)
    keys = frame["entity"].unique().sort()
    quarter = keys.sample(fraction=0.25, seed=1)
    paths = {}
    for name, chosen in (("small", quarter.sample(fraction=0.25, seed=2)), ("sample", quarter)):
        paths[name] = tmp_path / f"{name}.parquet"
        frame.filter(pl.col("entity").is_in(chosen.implode())).write_parquet(paths[name])
    options = RunOptions(threshold=0.5, perms=64, bands=16, rows=4)
    histories = []
    for name in ("small", "sample"):
        run_job(paths[name], SPEC, options, tmp_path / f"{name}-idx")
        histories += ["--history", str(tmp_path / f"{name}-idx")]
    measured = run_job(full, SPEC, options, tmp_path / "full-idx")
    out = runner.invoke(app, ["plan", "--threshold", "0.5", "--sample", str(paths["sample"]), "--entity", "entity",
                              "--element", "element", "--perms", "64", "--bands", "16", "--rows", "4", "--entities",
                              str(measured["counts"]["entities"]), "--events", str(measured["counts"]["events"]),
                              *histories, "--json"])
    assert out.exit_code == 0, out.output
    fc = json.loads(out.output)["forecast"]
    assert fc["method"] == "scaled from 2 run(s) of the sample"
    assert fc["counts"]["candidate_pairs"] == pytest.approx(measured["counts"]["candidate_pairs"], rel=0.3)
    assert fc["counts"]["representatives"] == pytest.approx(measured["counts"]["representatives"], rel=0.1)
    assert fc["seconds"]["total"] > 0 and fc["peak_memory_bytes"] > 0
    w = Workload.from_manifest(measured)
    assert w.entities == fc["counts"]["entities"]


def _long_tailed(n: int, seed: int) -> pl.DataFrame:
    """Zipf(1.2) popular titles over a catalogue of 2n, log-normal set sizes (median 6), a fifth
    of the entities near-copies of another (each title replaced with probability U(0, 0.4))."""
    rng = np.random.default_rng(seed)
    sizes = np.clip(np.round(rng.lognormal(np.log(6.0), 1.6, n)), 1, 500).astype(np.int64)
    element = rng.zipf(1.2, int(sizes.sum())).astype(np.int64)
    element[element > 2 * n] = rng.integers(1, 2 * n + 1, int((element > 2 * n).sum()))
    entity = np.repeat(np.arange(n, dtype=np.int64), sizes)
    copies = rng.choice(n, n // 5, replace=False)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    keep = ~np.isin(entity, copies)
    ent, elem = [entity[keep]], [element[keep]]
    for c, src in zip(copies, rng.integers(0, n, len(copies)), strict=True):
        held = element[offsets[src]:offsets[src + 1]].copy()
        swap = rng.random(len(held)) < rng.uniform(0, 0.4)
        held[swap] = rng.integers(10**9, 2 * 10**9, int(swap.sum()))
        ent.append(np.full(len(held), c, dtype=np.int64))
        elem.append(held)
    return pl.DataFrame({"entity": np.concatenate(ent), "element": np.concatenate(elem)}).unique()


def _brute_similar(frame: pl.DataFrame, threshold: float) -> int:
    """Pairs of distinct sets with Jaccard >= threshold, by Python sets (identical sets are one)."""
    sets = {frozenset(g["element"].to_list()) for _, g in frame.group_by("entity")}
    sets = list(sets)
    return sum(len(a & b) / len(a | b) >= threshold for i, a in enumerate(sets) for b in sets[i + 1:])


def test_similar_pairs_of_the_sample_are_those_verification_finds(tmp_path):
    # Oracle: the verified pairs of a real run under the same plan (its manifest), and exact
    # Jaccard by Python sets over all pairs (a bound: the buckets find most of them). Looking at
    # a share of the first members only is unbiased: the mean over draws is near the whole count.
    frame = _frame(800, 8, 500)
    events = tmp_path / "events.parquet"
    frame.write_parquet(events)
    m = run_job(events, SPEC, RunOptions(threshold=0.5, perms=64, bands=16, rows=4), tmp_path / "idx")
    sets, _ = load_membership(events, SPEC)
    profile = sample_profile(sets, 64, 16, 4, threshold=0.5)
    left, right, looked = profile.similar_found(1.0, 10**9)
    assert looked == 1.0 and len(left) == 2 * m["counts"]["verified_pairs"]
    exact = _brute_similar(frame, 0.5)
    assert 0.8 * exact <= len(left) / 2 <= exact
    from lshjob.jobs.sample_profile import similar_found
    table = _profile_table(sets)
    ordered = 2 * profile.pair_rows()[0]
    for part in (0.4, 0.7):
        lo, _, share = similar_found(table, sets, 0.5, 1.0, 10**9, limit=int(part * ordered))
        assert share == pytest.approx(part, rel=0.01)
        assert len(lo) / (2 * share) == pytest.approx(m["counts"]["verified_pairs"], rel=0.3)


def _profile_table(sets):
    """The key table sample_profile builds (rep, a column a band, once), for looking at a share."""
    from lshjob.index.band.local import bucket_keys_by_position
    from lshjob.index.collapse import collapse_identical
    from lshjob.sign.signatures import SignatureParams, comparable_by_position

    rep_of, reps = collapse_identical(sets)
    once = np.bincount(rep_of, minlength=sets.size)[reps] == 1
    params = SignatureParams(scheme=default_of("scheme"), perms=64, seed=default_of("seed"))
    columns = comparable_by_position(sets, reps, params, 64)
    return bucket_keys_by_position(columns, reps, 16, 4).with_columns(once=pl.Series(once))


def test_verified_pairs_projected_from_a_tenth_match_the_full_run(tmp_path):
    # Oracle: the verified pairs of the full run (its manifest), against the projection from a
    # uniform 10% sample of its entities. Long-tailed sets (half hold 1-5 titles, mostly popular
    # ones, often repeated): weighting every pair of sets seen once in the sample by the average
    # weight squared overcounts; the weights by partners must come closer.
    from lshjob.plan.sample_weights import once_weight

    frame = _long_tailed(30_000, 5)
    full_path, part_path = _whole_and_tenth(frame, tmp_path)
    options = RunOptions(threshold=0.5, perms=64, bands=16, rows=4, max_bucket=10**6)
    full = run_job(full_path, SPEC, options, tmp_path / "full-idx")
    part_sets, _ = load_membership(part_path, SPEC)
    profile = sample_profile(part_sets, 64, 16, 4, threshold=0.5)
    projected = project_counts(profile, [], {"perms": 64, "bands": 16}, 30_000, len(frame), 1.0, "kperm", 50,
                               max_bucket=10**6)
    truth = full["counts"]["verified_pairs"]
    assert projected.workload.verified_pairs == pytest.approx(truth, rel=0.25)
    w = once_weight(profile.multiplicities, profile.entities / 30_000)
    left, right, _ = profile.similar_found(w, 10**6)
    weights = np.where(profile.multiplicities == 1, w, 1.0)
    flat = float((weights[left] * weights[right]).sum()) / 2
    assert abs(flat / truth - 1) > abs(projected.workload.verified_pairs / truth - 1)


def test_memory_grows_from_the_larger_run_at_most_a_word_a_word():
    # Oracle: algebra on the rule of scale_memory. A stage whose peak grows by 100 MB between
    # two small runs (the process's own buffers) grows beyond the larger run by at most 8 bytes
    # a driver word; one growing gently follows the line through the runs from the larger run's
    # peak; none is forecast below the larger run's own peak.
    from lshjob.plan.peak_memory import MEMORY_DRIVERS, WORD_BYTES, scale_memory

    def load(n):
        return Workload(events=40 * n, entities=n, membership_rows=40 * n, representatives=n, perms=64, bands=16,
                        scheme="kperm", candidate_pairs=50 * n, verified_pairs=n, published_rows=5 * n)

    small, big, target = load(10_000), load(40_000), load(1_000_000)
    steep = {s: 300e6 for s in cost.STAGES} | {"verify": 300e6}
    steep_big = {s: 300e6 for s in cost.STAGES} | {"verify": 400e6}
    memory = 8 * 2**30
    out = scale_memory(cost.shipped_model(), [(small, steep, memory), (big, steep_big, memory)], target, memory)
    grow = MEMORY_DRIVERS["verify"](target, None) - MEMORY_DRIVERS["verify"](big, None)
    assert out["verify"] == pytest.approx(400e6 + WORD_BYTES * grow)
    assert out["ingest"] == pytest.approx(300e6)  # flat between the runs: the larger run's own peak
    d0, d1 = MEMORY_DRIVERS["verify"](small, None), MEMORY_DRIVERS["verify"](big, None)
    gentle_big = dict(steep) | {"verify": 300e6 + 2.0 * (d1 - d0)}  # 2 bytes a word
    out = scale_memory(cost.shipped_model(), [(small, steep, memory), (big, gentle_big, memory)], target, memory)
    assert out["verify"] == pytest.approx(gentle_big["verify"] + 2.0 * grow)


HELD_PROBE = """
import sys
from functools import partial
import numpy as np, polars as pl
from lshjob.index.verify.local import HeldRows, one_row_a_pair

def status(field):
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) * 1024 for line in fh if line.startswith(field + ":"))

rows, pairs, ids = 2_000_000, 1_500_000, 200_000
rng = np.random.default_rng(0)
with open("/proc/self/clear_refs", "w") as fh:
    fh.write("5")
start = status("VmRSS")
offsets = np.arange(0, 5 * (2 * ids + 1), 5, dtype=np.int64)  # sets of 5: what verification holds beside the rows
held = HeldRows(None, partial(one_row_a_pair, jaccard_of=lambda left, right: np.full(len(left), 0.5),
                              held_sets=(offsets, 0, offsets, 0)))
for lo in range(0, rows, 250_000):  # pieces as verification adds them, pairs repeating
    p = rng.integers(0, pairs, 250_000)
    held.add(pl.DataFrame({"left_rep": p % ids, "right_rep": ids + p // ids, "jaccard": np.full(len(p), 0.6),
                           "bands_shared": np.ones(len(p), dtype=np.int32)}))
held.result()
print((status("VmHWM") - start) / rows)
"""


@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="needs Linux's resident-memory high-water mark")
def test_verification_holds_about_the_words_the_memory_rule_counts_a_verified_row():
    # Oracle: the kernel's resident-memory high-water mark (VmHWM, reset through clear_refs) of a
    # fresh process holding 2M verified rows as verification adds them and deduplicating them
    # (lshjob.index.verify.local.HeldRows: the peak of verification at full size). The rule
    # counts HELD_ROW_WORDS 8-byte words a row; measured 86-104 bytes at 1M-8M rows on the
    # development machine, 108 in the 1M long-tailed run, before the rows carried their
    # intersection for the packed deduplication; 136-147 bytes then; 93 since the rows are
    # copied into one buffer a column and the pairs read from the sorted keys in one pass.
    import subprocess
    import sys

    from lshjob.plan.peak_memory import HELD_ROW_WORDS, WORD_BYTES

    done = subprocess.run([sys.executable, "-c", HELD_PROBE], capture_output=True, text=True, check=True)
    per_row = float(done.stdout.split()[-1])
    assert 0.6 <= per_row / (WORD_BYTES * HELD_ROW_WORDS) <= 1.4, per_row


ESTIMATE_PROBE = """
import sys
import numpy as np, polars as pl
from lshjob.core.sets import ElementSets
from lshjob.index.verify.estimates import add_estimates_between
from lshjob.jobs.options import default_of
from lshjob.sign.signatures import SignatureParams

def status(field):
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) * 1024 for line in fh if line.startswith(field + ":"))

n, perms, bound = 40_000, 256, int(sys.argv[1]) or None
rng = np.random.default_rng(0)
sizes = rng.integers(3, 20, n)
elements = np.concatenate([np.sort(rng.choice(5000, s, replace=False)) for s in sizes]).astype(np.int64)
sets = ElementSets(keys=pl.Series("k", np.arange(n)), offsets=np.concatenate([[0], np.cumsum(sizes)]),
                   elements=elements)
left, right = rng.integers(0, n, 60_000), rng.integers(0, n, 60_000)
keep = left < right
pairs = pl.DataFrame({"left_rep": left[keep], "right_rep": right[keep], "jaccard": np.full(keep.sum(), 0.6),
                      "bands_shared": np.ones(keep.sum(), dtype=np.int32)})
params = SignatureParams(scheme=default_of("scheme"), perms=perms, seed=default_of("seed"))
add_estimates_between(pairs[:10], sets, 0, sets, 0, params)  # kernels compiled first
with open("/proc/self/clear_refs", "w") as fh:
    fh.write("5")
start = status("VmRSS")
add_estimates_between(pairs, sets, 0, sets, 0, params, max_bytes=bound)
used = len(np.unique(np.concatenate([pairs["left_rep"].to_numpy(), pairs["right_rep"].to_numpy()])))
print(used, status("VmHWM") - start)
"""


@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="needs Linux's resident-memory high-water mark")
def test_the_estimates_hold_about_the_signature_words_the_memory_rule_counts():
    # Oracle: the kernel's resident-memory high-water mark of a fresh process making the
    # estimates of 30k pairs over 31k sets (lshjob.index.verify.estimates, k = 256), whole and
    # under a 16 MiB budget share, against the rule's words: k a set in a pair, at most the
    # budget's share (lshjob.plan.peak_memory._estimated). Measured 1.04 and 0.99 of it.
    import subprocess
    import sys

    from lshjob.plan.peak_memory import MEMORY_DRIVERS, WORD_BYTES
    from lshjob.runtime.budget import ESTIMATE_SHARE

    for bound in (0, 16 << 20):
        done = subprocess.run([sys.executable, "-c", ESTIMATE_PROBE, str(bound)], capture_output=True, text=True,
                              check=True)
        used, peak = (int(v) for v in done.stdout.split())
        w = Workload(events=0, entities=used, membership_rows=0, representatives=used, perms=256, bands=32,
                     scheme="kperm", candidate_pairs=0, verified_pairs=used, published_rows=0)
        words = MEMORY_DRIVERS["verify"](w, bound * ESTIMATE_SHARE if bound else None)
        assert 0.6 <= peak / (WORD_BYTES * words) <= 1.6, (bound, peak, words)


def test_rows_held_stay_within_the_steps_the_memory_rule_bounds_them_by():
    # Oracle: the rows lshjob.index.verify.local.HeldRows holds when it deduplicates (counted
    # on the class itself, pieces added as verification adds them), against the rule's bound
    # (the budget's bound on the rows held) while the top-k cut keeps half of it; and a rule
    # that keeps its driver below it, whatever the verified pairs.
    from lshjob.index.verify.local import HeldRows, one_row_a_pair
    from lshjob.plan.peak_memory import HELD_ROW_WORDS, MEMORY_DRIVERS
    from lshjob.runtime.budget import Budget

    step, piece, most = 50_000, 5_000, 0
    rng = np.random.default_rng(3)

    def dedup(rows):
        nonlocal most
        most = max(most, rows.height)
        return one_row_a_pair(rows)

    def cut(rows, floors=None):  # the rows kept, and no floor (HeldRows' cut returns both)
        return rows.sort("jaccard", descending=True).head(step // 2), np.full(1, -1.0)

    held = HeldRows(step, dedup, cut=cut)
    for _ in range(200):  # 1M rows, pairs repeating
        p = rng.integers(0, 400_000, piece)
        held.add(pl.DataFrame({"left_rep": p % 1000, "right_rep": 1000 + p // 1000, "jaccard": rng.random(piece),
                               "bands_shared": np.ones(piece, dtype=np.int32)}))
    held.result()
    assert step < most <= step + piece, most  # the kept rows and the new ones together within the bound
    memory = 8 * 2**30
    bound = Budget(memory).verify_held_rows()
    big = Workload(events=1e9, entities=1e8, membership_rows=1e9, representatives=1e6, perms=256, bands=40,
                   scheme="kperm", candidate_pairs=1e11, verified_pairs=10 * bound, published_rows=1e9)
    assert MEMORY_DRIVERS["verify"](big, memory) == pytest.approx(1e9 + HELD_ROW_WORDS * bound)
    assert MEMORY_DRIVERS["verify"](big, None) == pytest.approx(1e9 + HELD_ROW_WORDS * 10 * bound)


def test_the_crowds_share_of_the_sample_is_the_joins(tmp_path, monkeypatch):
    # Oracle: the DuckDB join of the same sample's bucket rows, writing a row per band and
    # listing buckets of 3-8 members or more as crowds (lshjob.index.join.duckdb): the pairs its
    # CROWDS file stands for (every pair of a crowd, by itertools in the conformance checks)
    # over all the pairs it counts, against the share SampleProfile.crowd_share finds; and the
    # crowds' cost scale (SampleProfile.crowds) against the same sum over the CROWDS file's
    # crowds by their members m, each pair weighted min(1, sqrt(F / m)), F set to 5 here.
    from lshjob.index._crowd_checks import crowd_rows
    from lshjob.index.band.local import bucket_keys_by_position, write_shared_bucket_rows
    from lshjob.index.collapse import collapse_identical
    from lshjob.index.engines import get_engine
    from lshjob.index.join import JoinSettings
    from lshjob.plan import scaling
    from lshjob.sign.signatures import SignatureParams, comparable_by_position

    frame = _repeating_sets(4000, 8)
    events = tmp_path / "events.parquet"
    frame.write_parquet(events)
    sets, _ = load_membership(events, SPEC)
    profile = sample_profile(sets, 64, 16, 4)
    _, reps = collapse_identical(sets)
    params = SignatureParams(scheme=default_of("scheme"), perms=64, seed=default_of("seed"))
    keys = bucket_keys_by_position(comparable_by_position(sets, reps, params, 64), reps, 16, 4)
    band = write_shared_bucket_rows(keys, 16, tmp_path / "buckets")
    for size in (3, 4, 5, 6, 8):
        settings = JoinSettings(memory_limit="512MB", temp_directory=str(tmp_path / "spill"), threads=2,
                                max_bucket=10**6, dedupe_up_to=0, max_repeat=1e9, crowd_size=size)
        out = get_engine("join", "duckdb").candidates(band.files, 16, tmp_path / f"candidates-{size}.parquet",
                                                      settings, bucket_rows=band.rows_total)
        crowded = len(crowd_rows(out.crowds))
        assert 0 < crowded < out.pairs, (size, crowded, out.pairs)
        assert profile.crowd_share(size, 10**6) == pytest.approx(crowded / out.pairs, rel=1e-9), size
        m = pl.read_parquet(out.crowds).group_by("crowd").len()["len"].to_numpy().astype(np.float64)
        pairs = m * (m - 1) / 2
        monkeypatch.setattr(scaling, "CROWD_FLAT_UP_TO", 5)
        share, scale = profile.crowds(size, 10**6)
        monkeypatch.undo()
        assert share == pytest.approx(crowded / out.pairs, rel=1e-9)
        expected = float((pairs * np.minimum(1.0, np.sqrt(5 / m))).sum() / pairs.sum())
        assert scale == pytest.approx(expected, rel=1e-9) and (scale < 1.0) == bool((m > 5).any()), size
    assert profile.crowd_share(10**5, 10**6) == 0.0
    assert profile.crowds(10**5, 10**6) == (0.0, 1.0)
