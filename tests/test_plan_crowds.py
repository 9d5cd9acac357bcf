"""The --max-candidates cap counts the pairs the join writes: on long-tailed data most candidate
pairs fall in crowds (buckets of 64+ members), which verification pairs up itself."""

from pathlib import Path

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from lshjob import EventSpec
from lshjob.cli.app import app
from lshjob.errors import ParameterError
from lshjob.index.join.base import JoinSettings
from lshjob.ingest.loading import load_membership
from lshjob.jobs.run import RunOptions, run_job
from lshjob.plan import similarity
from lshjob.plan.banding import crowd_split, data_plans
from lshjob.plan.choose import choose_plan

SPEC = EventSpec(entity="patron", element="title")
N, SAMPLE, CROWD = 4000, 300, JoinSettings.crowd_size


def long_tailed(n: int, seed: int = 7, median: float = 4.0, spread: float = 1.2, exponent: float = 1.2) -> pl.DataFrame:
    """Zipf 1.2 title popularity, log-normal loan counts (many patrons with 1-5 titles), a fifth
    of the patrons near-copies of another (as bench/common.py zipf_events, smaller)."""
    rng = np.random.default_rng(seed)
    sizes = np.clip(np.round(rng.lognormal(np.log(median), spread, n)), 1, 300).astype(np.int64)
    titles = rng.zipf(exponent, int(sizes.sum()))
    titles[titles > 2 * n] = rng.integers(1, 2 * n + 1, int((titles > 2 * n).sum()))
    patrons = np.repeat(np.arange(n), sizes)
    copies = rng.choice(n, n // 5, replace=False)
    sources = rng.integers(0, n, n // 5)
    keep = ~np.isin(patrons, copies)
    rows = [(patrons[keep], titles[keep])]
    for c, s in zip(copies, sources):
        own = titles[patrons == s]
        swap = rng.random(len(own)) < 0.2
        rows.append((np.full(len(own), c), np.where(swap, rng.integers(10 * n, 20 * n, len(own)), own)))
    p = np.concatenate([r[0] for r in rows])
    t = np.concatenate([r[1] for r in rows])
    return pl.DataFrame({"patron": [f"p{i:05d}" for i in p], "title": [f"t{i}" for i in t]}).unique()


@pytest.fixture(scope="module")
def loans(tmp_path_factory) -> tuple[Path, pl.DataFrame]:
    events = long_tailed(N, median=3.0, exponent=1.6)
    path = tmp_path_factory.mktemp("tail") / "loans.parquet"
    events.write_parquet(path)
    return path, events


@pytest.fixture(scope="module")
def split(loans):
    sets = load_membership(loans[0], SPEC)[0]
    hist = similarity.sample_histogram_from_sets(sets, SAMPLE, seed=0, threshold=0.5)
    best = data_plans(0.5, hist)[0]
    crowded = crowd_split(hist, best.bands, best.rows, CROWD)
    return hist, best, crowded


def python_sets(events: pl.DataFrame) -> dict[str, frozenset]:
    return {k: frozenset(v) for k, v in events.group_by("patron").agg("title").iter_rows()}


def test_crowd_split_matches_bucket_sizes_from_python_sets(loans, split):
    # Oracle: exact Jaccard with Python sets of the same sampled patrons against all; a patron is
    # crowded when 1 + sum_j J_j**r (expected members of its bucket, MMDS 3.4) reaches 64.
    hist, best, crowded = split
    sets = python_sets(loans[1])
    keys = sorted(sets)
    picked = np.sort(np.random.default_rng(0).permutation(len(keys))[:SAMPLE])
    assert hist.sample_entities == SAMPLE  # against all, every sampled patron kept
    crowd_pairs = all_pairs = 0.0
    for i in picked:
        a = sets[keys[i]]
        js = np.array([len(a & b) / len(a | b) for k, b in sets.items() if k != keys[i] and a & b])
        js = js[js < 1.0]  # identical sets are collapsed before banding
        p = 1 - (1 - js**best.rows) ** best.bands
        all_pairs += p.sum()
        if 1 + (js**best.rows).sum() >= CROWD:
            crowd_pairs += p.sum()
    assert crowd_pairs / all_pairs > 0.2  # the data are long-tailed enough to test anything
    assert crowded == pytest.approx(crowd_pairs / all_pairs, abs=0.05)  # bins of 0.02 stand for J


def test_a_plan_over_the_cap_only_by_its_crowds_runs(loans, split, tmp_path):
    # Oracle: the same run with the cap raised (the plan does not change), and the neighbours'
    # Jaccard recomputed with Python sets.
    hist, best, crowded = split
    cap = best.expected_candidates * (1 - crowded / 2)  # over all candidates, above those written
    with pytest.raises(ParameterError, match="more than --max-candidates"):  # the cap on all pairs
        choose_plan(0.5, hist, max_candidates=cap, runners_up=0)
    path, events = loans
    capped = run_job(path, SPEC, RunOptions(threshold=0.5, sample_size=SAMPLE, max_candidates=cap, recall_of="pairs"),
                     tmp_path / "a")
    run_job(path, SPEC, RunOptions(threshold=0.5, sample_size=SAMPLE, recall_of="pairs"), tmp_path / "b")
    plan = capped["plan"]  # the manifest's
    assert (plan["perms"], plan["bands"], plan["rows"]) == (best.perms, best.bands, best.rows)
    assert plan["predicted"]["expected_written_pairs"] <= cap < best.expected_candidates
    got = pl.read_parquet(tmp_path / "a" / "neighbours.parquet")
    assert got.equals(pl.read_parquet(tmp_path / "b" / "neighbours.parquet"))
    sets = python_sets(events)
    assert got.height > 1000
    for a, b, j in got.select("entity", "neighbour", "jaccard").iter_rows():
        assert j == pytest.approx(len(sets[a] & sets[b]) / len(sets[a] | sets[b]))


def test_a_plan_whose_written_pairs_exceed_the_cap_is_refused(loans, split, tmp_path):
    # Oracle: the split above; a cap below the pairs written by every plan leaves none.
    hist, best, crowded = split
    cap = best.expected_candidates * (1 - crowded) / 1000
    result = CliRunner().invoke(app, ["run", str(loans[0]), "--entity", "patron", "--element", "title",
                                      "--threshold", "0.5", "--sample-size", str(SAMPLE), "--recall-of", "pairs",
                                      "--max-candidates",
                                      str(cap), "--out", str(tmp_path / "idx")])
    assert result.exit_code == 2
    written = best.expected_candidates * (1 - crowded)
    assert (f"predicts {best.expected_candidates:.3g} candidate pairs at threshold 0.5 ({written:.3g} outside "
            "crowds, written by the join)") in result.stderr
    assert f"more than --max-candidates {cap:.3g}; raise the threshold or --max-candidates" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "idx").exists()


def test_over_the_cap_the_first_ranked_plan_whose_written_pairs_fit_is_chosen(split):
    # Oracle: the ranking of data_plans (fewest candidates first) walked by hand, each plan's
    # written pairs = candidates x (1 - its crowd share).
    hist, best, _ = split
    ranked = data_plans(0.5, hist)
    written = [p.expected_candidates * (1 - crowd_split(hist, p.bands, p.rows, CROWD)) for p in ranked]
    cap = min(written[:50])  # met by a plan among the first 50, and by none before it
    first = next(i for i, w in enumerate(written) if w <= cap)
    assert first > 0  # the plan with the fewest candidates does not fit: another is taken
    plan = choose_plan(0.5, hist, max_candidates=cap, runners_up=0, crowd_size=CROWD)
    chosen = ranked[first]
    assert (plan.perms, plan.bands, plan.rows) == (chosen.perms, chosen.bands, chosen.rows)
    assert plan.predicted["expected_written_pairs"] == pytest.approx(written[first])
    assert plan.predicted["expected_recall"] >= 0.95
    assert all(w > cap for w in written[:first])
