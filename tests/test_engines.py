"""Engines of the band, join and verify stages: every registered engine passes the
conformance checks (lshjob/index/conformance.py, lshjob/jobs/conformance.py), an unknown
name is refused with the valid ones, and a broken engine fails the check of its rule."""

import sys

import polars as pl
import pytest

from lshjob.errors import ParameterError
from lshjob.index import conformance, engines
from lshjob.index.band.base import BandEngine
from lshjob.index.band.local import LocalBand
from lshjob.index.join.base import JoinEngine, JoinOutput
from lshjob.index.verify.base import VerifyEngine
from lshjob.index.verify.local import LocalVerify
from lshjob.jobs.conformance import check_index
from lshjob.jobs.run import RunOptions

CHECKS = {"band": conformance.check_band, "join": conformance.check_join, "verify": conformance.check_verify}
INTERFACES = {"band": BandEngine, "join": JoinEngine, "verify": VerifyEngine}


def _started(names, request) -> None:
    """The Spark engines run on the tests' one local Spark session (skipped, saying why,
    without Java or pyspark)."""
    if "spark" in names:
        request.getfixturevalue("spark_session")


@pytest.mark.parametrize("stage,name", [(s, n) for s in engines.STAGES for n in engines.names(s)])
def test_every_engine_keeps_its_stage_contract(stage, name, tmp_path, request):
    # Oracles (in the checks): bucket keys in Python integers from the documented definition
    # grouped by polars; pairs per bucket by itertools with the oversize split; Jaccard by
    # Python sets.
    _started([name], request)
    engine = engines.get_engine(stage, name)
    assert isinstance(engine, INTERFACES[stage]) and engine.name == name
    CHECKS[stage](engine, tmp_path)


def _choices():
    """The default engines, and each other engine name on every stage that registers it (the
    defaults on the others), as ``--engine NAME`` chooses them."""
    others = sorted({n for s in engines.STAGES for n in engines.names(s) if n != engines.DEFAULT_ENGINES[s]})
    return [{}] + [{s: n for s in engines.STAGES if n in engines.names(s)} for n in others]


@pytest.mark.parametrize("chosen", _choices(), ids=lambda c: ",".join(f"{s}={n}" for s, n in c.items()) or "defaults")
def test_a_whole_run_with_the_engines_publishes_the_default_neighbours(chosen, tmp_path, request):
    # Oracle: the default engines' index in one part; the chosen ones run in one part and in
    # three key ranges (for the defaults: one part against three ranges).
    _started(chosen.values(), request)
    check_index(chosen, tmp_path)


def test_an_unknown_engine_is_refused_with_the_valid_names(tmp_path):
    with pytest.raises(ParameterError, match=r"^join engine must be one of: duckdb, spark; got 'gpu'$"):
        engines.get_engine("join", "gpu")
    with pytest.raises(ParameterError, match=r"^engine stage must be one of: band, join, verify; got 'publish'$"):
        engines.names("publish")
    with pytest.raises(ParameterError, match=r"^verify engine must be one of: local, spark; got 'gpu'$"):
        RunOptions(threshold=0.5, engines={"verify": "gpu"}).validate()
    with pytest.raises(ParameterError, match="engine target must be 'module:Class'"):
        engines.register("join", "cluster", "lshjob_cluster.join")


def test_an_engine_module_is_imported_only_when_chosen():
    # Reference: sys.modules, in a fresh interpreter (this one has imported everything).
    import subprocess

    code = ("import sys, lshjob.jobs.run, lshjob.index.engines as e; before = 'duckdb' in sys.modules; "
            "e.get_engine('join', 'duckdb'); print(before, 'duckdb' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False)
    assert done.stdout.split() == ["False", "True"], done.stderr[-2000:]


# Broken engines: each check must name the rule they break.

class LosingBand(LocalBand):
    name = "losing"

    def shared_rows(self, key_slices, bands, out_dir, batch_bytes, progress=None):
        out = super().shared_rows(key_slices, bands, out_dir, batch_bytes, progress)
        table = pl.read_parquet(out.files[0])
        table.slice(1).write_parquet(out.files[0])  # one row lost
        return out


class CountingOnceJoin:
    name = "counting-once"

    def candidates(self, bucket_files, bands, out, settings, bucket_rows=None, ranges=None):
        inner = engines.get_engine("join", "duckdb")
        made = inner.candidates(bucket_files, bands, out, settings, bucket_rows, ranges)
        if ranges is None:
            pl.read_parquet(out).with_columns(bands_shared=pl.lit(1, pl.Int32)).write_parquet(out)
        return JoinOutput(made.candidates, made.pairs, made.skew)


class RoundingVerify(LocalVerify):
    name = "rounding"

    def verify(self, candidates, sets, threshold, params, settings):
        got = super().verify(candidates, sets, threshold, params, settings)
        return got.with_columns(pl.col("jaccard").round(3))


@pytest.mark.parametrize("stage,engine,rule", [
    ("band", LosingBand(), "exactly the rows of buckets of two or more"),
    ("join", CountingOnceJoin(), "counted per pair"),
    ("verify", RoundingVerify(), "jaccard = |A & B| / |A | B| exactly"),
])
def test_a_broken_engine_fails_the_check_of_its_rule(stage, engine, rule, tmp_path):
    with pytest.raises(AssertionError, match=rule.replace("|", r"\|")):
        CHECKS[stage](engine, tmp_path)


def test_a_registered_engine_is_run_by_name_and_a_wrong_one_fails_the_whole_run_check(tmp_path):
    engines.register("verify", "rounding", "test_engines:RoundingVerify")
    try:
        assert engines.names("verify") == ["local", "rounding", "spark"]
        assert isinstance(engines.get_engine("verify", "rounding"), RoundingVerify)
        with pytest.raises(AssertionError, match="engines {'verify': 'rounding'} in 1 part"):
            check_index({"verify": "rounding"}, tmp_path)
    finally:
        engines._ENGINES["verify"].pop("rounding")


def test_an_engine_whose_library_is_missing_is_refused_with_the_package_to_install(tmp_path, monkeypatch):
    # Oracle: the documented one-line message (exit code 2 through ParameterError).
    (tmp_path / "ghost_engine.py").write_text("import lshjob_no_such_library\n\nclass Ghost:\n    name = 'ghost'\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    engines.register("join", "ghost", "ghost_engine:Ghost")
    try:
        with pytest.raises(ParameterError, match=r"^the ghost join engine needs lshjob_no_such_library, which is not "
                           r"installed \(pip install 'lshjob\[ghost\]'\)$"):
            engines.get_engine("join", "ghost")
    finally:
        engines._ENGINES["join"].pop("ghost")
