"""The compile cache: its folder (LSHJOB_CACHE_DIR, NUMBA_CACHE_DIR), the notice printed when
kernels compile, and ``lshjob compile-kernels``.

Oracle throughout: numba's own cache statistics (``dispatcher.stats.cache_hits`` and
``cache_misses``: a miss is a compile) and the cache files numba writes (``.nbi`` index,
``.nbc`` code), read in fresh processes pointed at empty folders.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.ingest.grouping import _quicksort

NOTICE = "lshjob: compiling kernels for this machine"

# One small kernel, called in a fresh process; prints numba's misses and hits for it and
# the folder numba was told to use.
SMALL_KERNEL = """
import sys
sys.argv = ["lshjob"] + sys.argv[1:]
{first}
import numpy as np
import numba
import lshjob
from lshjob.ingest.grouping import compact
compact(np.array([0, 2, 3]), np.array([5, 6, 7]), np.array([2, 1]))
print(sum(compact.stats.cache_misses.values()), sum(compact.stats.cache_hits.values()), numba.config.CACHE_DIR)
"""

# Every compiled function of the package after some work: (misses, hits) summed.
COUNT_COMPILES = """
import importlib, pkgutil, sys
import lshjob
from numba.core.registry import CPUDispatcher
{work}
misses = hits = 0
for info in pkgutil.walk_packages(lshjob.__path__, "lshjob."):
    module = importlib.import_module(info.name)
    for obj in vars(module).values():
        if isinstance(obj, CPUDispatcher) and obj.py_func.__module__ == module.__name__:
            misses += sum(obj.stats.cache_misses.values())
            hits += sum(obj.stats.cache_hits.values())
print(misses, hits)
"""


def _env(**settings) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("LSHJOB_CACHE_DIR", "NUMBA_CACHE_DIR")}
    env.update({k: str(v) for k, v in settings.items()})
    return env


def _python(code: str, env: dict, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code, *args], env=env, capture_output=True, text=True,
                          timeout=600, check=True)


def _cache_files(folder: Path) -> tuple[list[Path], list[Path]]:
    return sorted(folder.rglob("*.nbi")), sorted(folder.rglob("*.nbc"))


def test_notice_when_a_kernel_compiles_and_not_when_it_is_cached(tmp_path):
    cache = tmp_path / "cache"
    cold = _python(SMALL_KERNEL.format(first=""), _env(LSHJOB_CACHE_DIR=cache))
    misses, hits, folder = cold.stdout.split()
    assert (int(misses), int(hits)) == (1, 0)  # numba compiled it: the cache was cold
    assert NOTICE in cold.stderr and str(cache) in cold.stderr
    assert cold.stderr.count(NOTICE) == 1
    assert folder == str(cache)
    index, code = _cache_files(cache)
    assert index and code

    warm = _python(SMALL_KERNEL.format(first=""), _env(LSHJOB_CACHE_DIR=cache))
    assert warm.stdout.split()[:2] == ["0", "1"]  # loaded from the cache
    assert NOTICE not in warm.stderr


def test_no_notice_under_quiet(tmp_path):
    cache = tmp_path / "cache"
    quiet = _python(SMALL_KERNEL.format(first=""), _env(LSHJOB_CACHE_DIR=cache), "run", "--quiet")
    assert quiet.stdout.split()[:2] == ["1", "0"]  # it did compile
    assert NOTICE not in quiet.stderr
    assert _cache_files(cache)[0]


def test_numba_cache_dir_is_honoured_and_lshjob_cache_dir_wins(tmp_path):
    numba_dir, lshjob_dir = tmp_path / "numba", tmp_path / "lshjob"
    # NUMBA_CACHE_DIR alone: numba's own setting is used as it is
    alone = _python(SMALL_KERNEL.format(first=""), _env(NUMBA_CACHE_DIR=numba_dir))
    assert alone.stdout.split()[2] == str(numba_dir)
    assert _cache_files(numba_dir)[0]
    # both set, numba imported before lshjob: LSHJOB_CACHE_DIR still decides
    both = _python(SMALL_KERNEL.format(first="import numba"),
                   _env(NUMBA_CACHE_DIR=numba_dir, LSHJOB_CACHE_DIR=lshjob_dir))
    assert both.stdout.split()[:3] == ["1", "0", str(lshjob_dir)]
    assert _cache_files(lshjob_dir)[0]


def test_compile_kernels_refuses_a_cache_folder_it_cannot_write(tmp_path):
    # Oracle: the file system (a path under a plain file cannot be a folder); exit code 2 and
    # one line naming the folder, before any compiling.
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    result = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "compile-kernels"],
                            env=_env(LSHJOB_CACHE_DIR=blocker / "cache"), capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: compile cache folder") and str(blocker / "cache") in lines[0]
    assert NOTICE not in result.stderr


def test_quicksort_fallback_heapsort_sorts_like_numpy():
    # Oracle: numpy's sort. Depth 0 sends every range longer than the insertion-sort cut-off
    # straight to the heapsort fallback.
    rng = np.random.default_rng(3)
    for n in (25, 26, 100, 1000):
        for values in (rng.integers(-50, 50, n), rng.integers(-2**62, 2**62, n), np.arange(n)[::-1].copy(),
                       np.full(n, 7)):
            a = np.concatenate([[99], values, [-99]]).astype(np.int64)
            _quicksort(a, 1, n + 1, 0)
            assert a[0] == 99 and a[-1] == -99  # outside the range: untouched
            assert np.array_equal(a[1:-1], np.sort(values))


def test_compile_kernels_fills_the_cache_then_a_run_compiles_nothing(tmp_path, compiled_kernels):
    """``lshjob compile-kernels`` into the session's cache folder (tests/conftest.py runs it at
    the session's start, paying the cold compile once; in a fresh clone the folder starts
    empty); then, in fresh processes, a run, a signing and an audit on data the command never
    saw compile nothing (numba's misses), and the CLI prints no notice."""
    cache = Path(os.environ["LSHJOB_CACHE_DIR"])  # the session's folder (tests/conftest.py)
    summary = compiled_kernels["summary"]
    assert summary["cache_dir"] == str(cache)
    index, code = _cache_files(cache)
    assert index and code
    if compiled_kernels["was_empty"]:  # a fresh clone, as in CI: the command filled an empty folder
        assert summary["kernels_compiled"] >= 10 and summary["compiled"]
        assert len(index) >= summary["kernels_compiled"]

    from lshjob.demo.generate import generate_events

    events, _ = generate_events(120, seed=2)  # other data than the command's
    path = tmp_path / "loans.parquet"
    events.with_columns(pl.col("patron").str.slice(1).cast(pl.Int64) * 7).write_parquet(path)
    work = f"""
from lshjob import EventSpec, SignatureParams, sign_file
from lshjob.audit.check import audit_index
from lshjob.jobs.run import RunOptions, run_job
spec = EventSpec(entity="patron", element="title")
run_job(r"{path}", spec, RunOptions(threshold=0.5, top_k=5), r"{tmp_path / 'index'}")
audit_index(r"{tmp_path / 'index'}", sample=30)
sign_file(r"{path}", r"{tmp_path / 'sigs.parquet'}", spec, SignatureParams(scheme="oph"))
"""
    counted = _python(COUNT_COMPILES.format(work=work), _env(LSHJOB_CACHE_DIR=cache))
    misses, hits = map(int, counted.stdout.split())
    assert misses == 0 and hits >= 10

    run = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "run", str(path), "--entity", "patron", "--element",
                          "title", "--threshold", "0.5", "--out", str(tmp_path / "index2")],
                         env=_env(LSHJOB_CACHE_DIR=cache), capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr
    assert NOTICE not in run.stderr
