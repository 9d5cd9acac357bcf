"""lshjob audit: recall as the index promises it (true top-k at or above the threshold, ties
at the k-th value honoured, truncation never a miss), the gate (--min-recall), the check of
neighbours.parquet against the manifest, and the warning for events other than the run's."""

import hashlib
import itertools
import json
import shutil
import subprocess
import sys
from fractions import Fraction

import polars as pl
import pytest
from scipy.stats import binom
from typer.testing import CliRunner

from lshjob import EventSpec, ParameterError
from lshjob.audit.check import _expected_filled, audit_index
from lshjob.cli.app import app
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")
TOP_K = 3


def _library() -> dict[str, set[str]]:
    """Patrons' sets of titles, made so that 'ann' has five true neighbours at Jaccard 0.9,
    0.8, 0.6, 0.6 and 0.6: with top-3, three of them tie for the last place. Other patrons
    have more true neighbours than top-3 too (truncation: pia and quin are true neighbours,
    but each has five closer ones), or fewer, or none."""
    a = [f"t{i:02d}" for i in range(10)]
    sets = {
        "ann": set(a),
        "bea": set(a[:9]),  # 9/10 with ann
        "cal": set(a[:8]),  # 8/10
        "dee": set(a[:6]),  # the three at 6/10
        "eli": set(a[4:]),
        "fay": set(a[:3] + a[7:]),
        "gus": {f"u{i}" for i in range(12)},
        "hal": {f"u{i}" for i in range(11)},
        "ida": {f"u{i}" for i in range(3, 12)},
    }
    c = [f"c{i:02d}" for i in range(12)]
    sets["ora"] = set(c)
    for name, left_out in zip(("kit", "lou", "max", "ned"), c[3:7]):
        sets[name] = set(c) - {left_out}  # 11/12 with ora, 10/12 with each other
    sets["pia"], sets["quin"] = set(c[3:]), set(c[:9])  # 6/12 with each other, below five others each
    for n in range(30):  # patrons of their own titles: no neighbour
        sets[f"z{n:02d}"] = {f"z{n}-{i}" for i in range(5 + n % 7)}
    return sets


def _true_neighbours(sets: dict[str, set[str]], threshold: float) -> dict[str, dict[str, Fraction]]:
    # Oracle: exact brute force over Python sets, Jaccard as exact fractions.
    out: dict[str, dict[str, Fraction]] = {p: {} for p in sets}
    for p, q in itertools.combinations(sets, 2):
        j = Fraction(len(sets[p] & sets[q]), len(sets[p] | sets[q]))
        if j >= threshold:
            out[p][q] = out[q][p] = j
    return out


def _promised_recall(truth: dict[str, dict[str, Fraction]], published: dict[str, set[str]], k: int) -> Fraction:
    """The definition, written out over the brute-force truth: each entity's min(n, k) places;
    neighbours above the k-th true value fill one each when published, those equal to it
    fill the places left, at most."""
    places = filled = 0
    for p, nbrs in truth.items():
        values = sorted(nbrs.values(), reverse=True)
        if not values:
            continue
        cut = values[k - 1] if len(values) > k else Fraction(-1)
        above = [q for q, j in nbrs.items() if j > cut]
        tied = [q for q, j in nbrs.items() if j == cut]
        left = min(len(values), k) - len(above)
        places += min(len(values), k)
        filled += len(set(above) & published.get(p, set())) + min(len(set(tied) & published.get(p, set())), left)
    return Fraction(filled, places)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """The library's index at threshold 0.5, top-3, with 64 bands of 2 rows (a pair at 0.5
    is a candidate with probability 1 - 0.75**64 > 0.99999: every true pair is found)."""
    folder = tmp_path_factory.mktemp("audit")
    sets = _library()
    events = pl.DataFrame([(p, t) for p, s in sets.items() for t in sorted(s)],
                          schema=["patron", "title"], orient="row")
    src = folder / "loans.parquet"
    events.write_parquet(src)
    run_job(src, SPEC, RunOptions(threshold=0.5, top_k=TOP_K, perms=128, bands=64, rows=2), folder / "idx")
    return folder, sets


def _copy_index(folder, name):
    target = folder / name
    shutil.rmtree(target, ignore_errors=True)
    shutil.copytree(folder / "idx", target)
    return target


def _republish(index, table: pl.DataFrame) -> None:
    """Write a changed neighbour table and record its sha256 in the manifest, as a publish
    would: the index is then consistent, only its contents differ."""
    path = index / "neighbours.parquet"
    table.write_parquet(path)
    manifest = json.loads((index / "manifest.json").read_text())
    manifest["output"]["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    (index / "manifest.json").write_text(json.dumps(manifest))


def _published(table: pl.DataFrame) -> dict[str, set[str]]:
    out: dict[str, set[str]] = {}
    for p, q in table.select("entity", "neighbour").iter_rows():
        out.setdefault(p, set()).add(q)
    return out


def test_a_complete_index_truncated_at_top_k_has_recall_one(built):
    # Oracle: brute force over Python sets. The index holds each entity's true top-3 (checked
    # here against the brute force), while several entities have more than three true
    # neighbours, so truncation leaves true pairs out: neither figure may count them as misses.
    folder, sets = built
    truth = _true_neighbours(sets, 0.5)
    table = pl.read_parquet(folder / "idx/neighbours.parquet")
    for p, nbrs in truth.items():
        got = sorted((truth[p][q] for q in _published(table).get(p, ())), reverse=True)
        assert got == sorted(nbrs.values(), reverse=True)[:TOP_K]
    assert sum(len(n) > TOP_K for n in truth.values()) >= 8
    assert "quin" in truth["pia"] and "quin" not in _published(table)["pia"] and "pia" not in _published(table)["quin"]
    report = audit_index(folder / "idx", sample=len(sets))
    assert report["true_pairs"] == sum(len(n) for n in truth.values())
    assert report["expected_in_index"] == sum(min(len(n), TOP_K) for n in truth.values())
    assert report["recall"] == 1.0 and report["distinct_recall"] == 1.0
    assert report["entities_tied_at_top_k"] >= 1  # ann: three neighbours at 0.6 for one place
    assert report["predicted_recall"] > 0.9999 and report["failed"] == [] and report["warnings"] == []


def test_which_tied_neighbour_is_published_does_not_matter(built):
    # Oracle: brute force. ann's third place is shared by dee, eli and fay (all 0.6): the
    # index publishes the first by key; publishing another of them is as good.
    folder, sets = built
    truth = _true_neighbours(sets, 0.5)
    assert sorted(truth["ann"].values(), reverse=True) == [Fraction(9, 10), Fraction(4, 5)] + [Fraction(3, 5)] * 3
    index = _copy_index(folder, "swapped")
    table = pl.read_parquet(index / "neighbours.parquet")
    assert _published(table)["ann"] == {"bea", "cal", "dee"}
    _republish(index, table.with_columns(
        pl.when((pl.col("entity") == "ann") & (pl.col("neighbour") == "dee")).then(pl.lit("fay"))
        .otherwise(pl.col("neighbour")).alias("neighbour")))
    report = audit_index(index, sample=len(sets))
    assert report["recall"] == 1.0 and report["wrong_pairs"] == 0


def test_a_missing_neighbour_gives_the_exact_recall(built):
    # Oracle: brute force, and the definition written out over it (_promised_recall). cal
    # (0.8, second place) is left out of ann's list and a second neighbour tied at 0.6 takes
    # its row: three rows published, all true, but one place of ann's top-3 is not filled.
    folder, sets = built
    truth = _true_neighbours(sets, 0.5)
    index = _copy_index(folder, "missing")
    table = pl.read_parquet(index / "neighbours.parquet")
    changed = table.with_columns(
        pl.when((pl.col("entity") == "ann") & (pl.col("neighbour") == "cal")).then(pl.lit("eli"))
        .otherwise(pl.col("neighbour")).alias("neighbour"),
        pl.when((pl.col("entity") == "ann") & (pl.col("neighbour") == "cal")).then(0.6)
        .otherwise(pl.col("jaccard")).alias("jaccard"))
    _republish(index, changed)
    places = sum(min(len(n), TOP_K) for n in truth.values())
    expected = _promised_recall(truth, _published(changed), TOP_K)
    assert expected == Fraction(places - 1, places)
    report = audit_index(index, sample=len(sets))
    assert report["found"] == places - 1 and report["recall"] == pytest.approx(float(expected), abs=1e-15)
    assert report["wrong_pairs"] == 0


def test_expected_places_filled_among_tied_neighbours_matches_scipy():
    # Reference: scipy's binomial distribution, E[min(X, s)] = sum over x of min(x, s) P(X = x).
    for ties, places, p in [(3, 1, 0.7), (5, 2, 0.35), (40, 7, 0.9), (1, 1, 0.5), (6, 6, 0.2), (4, 2, 1.0)]:
        reference = sum(min(x, places) * binom.pmf(x, ties, p) for x in range(ties + 1))
        assert _expected_filled(ties, places, p) == pytest.approx(reference, rel=1e-12, abs=1e-15)


def _lshjob(*args):
    return subprocess.run([sys.executable, "-m", "lshjob.cli.app", *map(str, args)], capture_output=True, text=True)


def test_the_gate_exits_1_below_min_recall_and_0_at_it(built):
    # Oracle: the recall of the index with one known missing neighbour, (places - 1) / places
    # from the brute force; the command's exit codes (1: a check failed, 0: done).
    folder, sets = built
    truth = _true_neighbours(sets, 0.5)
    index = _copy_index(folder, "gate")
    table = pl.read_parquet(index / "neighbours.parquet")
    _republish(index, table.filter(~((pl.col("entity") == "ann") & (pl.col("neighbour") == "bea"))))
    places = sum(min(len(n), TOP_K) for n in truth.values())
    measured = (places - 1) / places
    at = _lshjob("audit", index, "--sample", len(sets), "--min-recall", repr(measured), "--json")
    assert at.returncode == 0, at.stderr
    assert json.loads(at.stdout)["recall"] == measured and json.loads(at.stdout)["failed"] == []
    above = _lshjob("audit", index, "--sample", len(sets), "--min-recall", "0.99", "--quiet")
    assert above.returncode == 1
    assert f"recall {measured:.4f} measured on {len(sets)} sampled entities is below --min-recall 0.99" in above.stderr


def test_a_neighbour_table_other_than_the_manifests_fails_and_a_missing_one_is_bad_input(built):
    # Oracle: hashlib's sha256 of the file against the manifest's; exit 1 (a failed check,
    # nothing measured) and exit 2 (no table to check).
    folder, sets = built
    index = _copy_index(folder, "tampered")
    table = pl.read_parquet(index / "neighbours.parquet")
    table.head(table.height - 1).write_parquet(index / "neighbours.parquet")
    result = CliRunner().invoke(app, ["audit", str(index), "--json"])
    assert result.exit_code == 1
    report = json.loads(result.stdout)
    actual = hashlib.sha256((index / "neighbours.parquet").read_bytes()).hexdigest()
    assert report["audited"] is False and actual in report["failed"][0] and "differs from the manifest" in result.stderr
    (index / "neighbours.parquet").unlink()
    result = CliRunner().invoke(app, ["audit", str(index)])
    assert result.exit_code == 2 and "neighbours.parquet: no such file" in result.stderr


def test_events_other_than_the_runs_input_are_warned_about(built, tmp_path):
    # Oracle: the manifest's input digest (sha256 over the files' own sha256, bytes only). A
    # byte-identical copy under another path is the run's input; a copy without one loan is
    # not, and the audit says so on stderr and in the report.
    folder, sets = built
    copy = tmp_path / "same.parquet"
    shutil.copyfile(folder / "loans.parquet", copy)
    same = CliRunner().invoke(app, ["audit", str(folder / "idx"), "--events", str(copy), "--json"])
    assert same.exit_code == 0 and json.loads(same.stdout)["warnings"] == [] and "warning" not in same.stderr
    changed = tmp_path / "changed.parquet"
    pl.read_parquet(copy).head(-1).write_parquet(changed)
    other = CliRunner().invoke(app, ["audit", str(folder / "idx"), "--events", str(changed), "--json"])
    warnings = json.loads(other.stdout)["warnings"]
    assert len(warnings) == 1 and "differ from the run's input" in warnings[0]
    assert f"warning: {warnings[0]}" in other.stderr


def test_a_gate_fails_when_no_recall_can_be_measured(built, tmp_path):
    # Oracle: brute force over Python sets: the patrons z00..z29 read alone share no title,
    # so the sample holds no true pair and the gate cannot pass; without a gate nothing fails.
    folder, sets = built
    alone = {p: s for p, s in sets.items() if p.startswith("z")}
    assert all(not n for n in _true_neighbours(alone, 0.5).values())
    events = tmp_path / "alone.parquet"
    pl.DataFrame([(p, t) for p, s in alone.items() for t in sorted(s)], schema=["patron", "title"],
                 orient="row").write_parquet(events)
    gated = audit_index(folder / "idx", events=events, sample=len(alone), min_recall=0.5)
    assert gated["recall"] is None and gated["true_pairs"] == 0
    assert gated["failed"] == [f"recall could not be measured (no true pair among the {len(alone)} sampled entities); "
                               "--min-recall 0.5 needs one"]
    assert audit_index(folder / "idx", events=events, sample=len(alone))["failed"] == []
    with pytest.raises(ParameterError, match=r"--min-recall must be in \[0, 1\]; got 1.5"):
        audit_index(folder / "idx", min_recall=1.5)
