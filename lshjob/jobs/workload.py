"""A tiny run of every command, on generated library loans, so that each compiled kernel is
called with every kind of argument the job passes it (``lshjob compile-kernels``).

The data: 300 patrons of the demo network (:mod:`lshjob.demo.generate`), written five ways:
text keys (``P000123``, ``T000042``); integer keys in a small range (Int32 in the file);
integer patron keys spread wide (so the loader takes its general path); integer patrons
with text titles; unsigned patron keys. Invented data.
"""

from __future__ import annotations

import os
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.audit.check import audit_index
from lshjob.core import compile_cache
from lshjob.core.sets import ElementSets
from lshjob.demo.generate import generate_events
from lshjob.index.verify._crowds import crowd_pairs_between, verify_crowds
from lshjob.index.verify.base import VerifySettings
from lshjob.index.verify.local import verify_blocks
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.run import RunOptions, run_job
from lshjob.jobs.sign import merge_files, plan_banding, sign_file
from lshjob.runtime.partitions import HeldSets
from lshjob.sign.signatures import SignatureParams

PATRONS = 300
SEED = 5
MEMORY = 2**30


def write_inputs(folder: Path) -> dict[str, Path]:
    """The three event files (see the module docstring)."""
    events, _ = generate_events(PATRONS, SEED)
    number = pl.col("patron").str.slice(1).cast(pl.Int64)
    files = {
        "text": events,
        "integer": events.with_columns(number.cast(pl.Int32).alias("patron"),
                                       pl.col("title").str.slice(1).cast(pl.Int32).alias("title")),
        "sparse": events.with_columns((number * 1_000_003 - 5_000_000_000).alias("patron"),
                                      pl.col("title").str.slice(1).cast(pl.Int64).alias("title")),
        "mixed": events.with_columns(number.alias("patron")),  # integer patrons, text titles
        "unsigned": events.with_columns(number.cast(pl.UInt64).alias("patron"),
                                        pl.col("title").str.slice(1).cast(pl.Int64).alias("title")),
    }
    paths = {}
    for name, frame in files.items():
        paths[name] = folder / f"loans-{name}.parquet"
        frame.write_parquet(paths[name])
    return paths


def exercise(folder: Path) -> list[str]:
    """Run the commands on the three inputs in ``folder``; return the steps taken."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = write_inputs(folder)
    plain = EventSpec(entity="patron", element="title")
    weighted = EventSpec(entity="patron", element="title", count="loans", min_count=2)
    monthly = EventSpec(entity="patron", element="title", segment="branch", time="borrowed_at", period="month")
    steps: list[str] = []

    def step(name, func, *args, **kwargs):
        func(*args, **kwargs)
        steps.append(name)

    for scheme in ("kperm", "oph"):
        params = SignatureParams(scheme=scheme, perms=64)
        for kind in ("text", "integer", "sparse", "mixed"):
            step(f"sign {kind} {scheme}", sign_file, paths[kind], folder / f"sig-{kind}-{scheme}.parquet", plain,
                 params, memory=MEMORY)
            step(f"sign {kind} {scheme} weighted", sign_file, paths[kind], folder / f"w-{kind}-{scheme}.parquet",
                 weighted, params, memory=MEMORY)
            step(f"sign {kind} {scheme} monthly", sign_file, paths[kind], folder / f"m-{kind}-{scheme}.parquet",
                 monthly, params, memory=MEMORY)
            step(f"sign {kind} {scheme} monthly in parts", sign_file, paths[kind],
                 folder / f"mp-{kind}-{scheme}.parquet", monthly, params, memory=MEMORY, parts=2)
        step(f"sign text {scheme} in parts", sign_file, paths["text"], folder / f"p-{scheme}.parquet", plain, params,
             memory=MEMORY, parts=2)
        step(f"merge {scheme}", merge_files, [folder / f"m-text-{scheme}.parquet"], folder / f"mm-{scheme}.parquet",
             since="2026-03-01", until="2026-10-01", memory=MEMORY)
        step(f"merge {scheme} in parts", merge_files, [folder / f"m-integer-{scheme}.parquet"],
             folder / f"mmp-{scheme}.parquet", memory=MEMORY, parts=2)
        step(f"plan from {scheme} signatures", plan_banding, 0.5, sample=folder / f"sig-text-{scheme}.parquet",
             sample_size=100)
    step("plan from events", plan_banding, 0.5, sample=paths["text"], spec=plain, sample_size=100)
    step("plan theory", plan_banding, 0.5, perms=128)

    runs = [
        ("text", plain, RunOptions(threshold=0.5, top_k=10, memory="1GiB")),
        ("text", plain, RunOptions(threshold=0.5, top_k=10, scheme="oph", memory="1GiB")),
        ("integer", plain, RunOptions(threshold=0.5, top_k=10, memory="1GiB")),
        ("integer", plain, RunOptions(threshold=0.5, top_k=10, scheme="oph", parts=2, memory="1GiB")),
        ("sparse", weighted, RunOptions(threshold=0.4, top_k=10, memory="1GiB")),
        ("text", weighted, RunOptions(threshold=0.4, top_k=10, parts=2, memory="1GiB")),
        ("text", plain, RunOptions(threshold=0.5, top_k=10, parts=2, memory="1GiB")),
        ("sparse", plain, RunOptions(threshold=1.0, top_k=10, memory="1GiB")),
        ("text", plain, RunOptions(threshold=1.0, top_k=10, parts=2, memory="1GiB")),
        ("mixed", plain, RunOptions(threshold=0.5, top_k=10, memory="1GiB")),
        ("mixed", weighted, RunOptions(threshold=0.4, top_k=10, parts=2, memory="1GiB")),
        ("unsigned", plain, RunOptions(threshold=0.5, top_k=10, memory="1GiB")),
    ]
    for i, (kind, spec, options) in enumerate(runs):
        index = folder / f"index-{i}"
        step(f"run {kind} {options.scheme} threshold {options.threshold} parts {options.parts}", run_job,
             paths[kind], spec, options, index)
        if i < 4:
            step(f"audit index {i}", audit_index, index, sample=50, memory=MEMORY, parts=2 if i % 2 else None)
    step("verify crowds", verify_a_crowd)
    step("verify rows per band and crowds by band", verify_rows_and_crowds, folder)
    return steps


def _crowd_sets() -> tuple[ElementSets, ElementSets]:
    """70 distinct small sets (entity e holds e // 10, 10 + e % 10 and 20 + e % 3), read-only
    (as saved parts are read) and writable (as a run loads them)."""
    e = np.arange(70, dtype=np.int64)
    rows = pl.DataFrame({"entity": np.repeat(e, 3), "element": np.stack([e // 10, 10 + e % 10, 20 + e % 3], 1).ravel()})
    sets = ElementSets.from_sets(rows)
    return sets, replace(sets, offsets=sets.offsets.copy(), elements=sets.elements.copy())


def verify_a_crowd() -> None:
    """The crowd kernel (:mod:`lshjob.index.verify._crowds`), which a run calls only on large
    joins of long-tailed data: one bucket of 70 small sets, in one key range and across two."""
    crowds = pl.DataFrame({"crowd": np.zeros(70, dtype=np.int64), "rep": np.arange(70, dtype=np.int64)})
    for sets in _crowd_sets():
        for left, right in (((0, 69), (0, 69)), ((0, 34), (35, 69))):
            verify_crowds(crowd_pairs_between(crowds, left, right), sets, 0, sets, 0, 0.5)


def verify_rows_and_crowds(folder: Path) -> None:
    """Verification as a large run on long-tailed data makes it, which the tiny runs above do
    not: pairs given a row per band (deduplicated as they come), crowds whose bands are known,
    top-k floors, a bucket held in reserve (judged by its members drawn: :mod:`lshjob.index.verify._reserve`),
    the sets both as loaded (writable) and as saved parts are read (read-only)."""
    e = np.arange(67, dtype=np.int64)  # e and e + 3 share two elements within a ten: J 0.5, met in two bands
    pl.DataFrame({"left_rep": np.concatenate([e, e]), "right_rep": np.concatenate([e + 3, e + 3]),
                  "bands_shared": np.ones(134, dtype=np.int32)}).write_parquet(folder / "rows.parquet")
    pl.DataFrame({"crowd": np.repeat(np.arange(1, 3, dtype=np.int64), 35), "rep": np.arange(70, dtype=np.int64),
                  "band": np.repeat(np.arange(2, dtype=np.int32), 35)}).write_parquet(folder / "crowds.parquet")
    pl.DataFrame({"crowd": np.ones(70, dtype=np.int64), "rep": np.arange(70, dtype=np.int64),
                  "band": np.full(70, 2, dtype=np.int32), "skipped": np.full(70, 2415, dtype=np.int64)}
                 ).write_parquet(folder / "reserve.parquet")
    settings = VerifySettings(held_rows=40, top_k=3, group_sizes=np.ones(70, dtype=np.int64), distinct_sets=True)
    for sets in _crowd_sets():
        verify_blocks(folder / "rows.parquet", HeldSets(sets), 0.3, SignatureParams(perms=64), settings,
                      folder / "crowds.parquet", folder / "reserve.parquet")


class _Recorder:
    """Which lshjob kernels numba compiled, for which types, and how long each took
    (a kernel's time includes the helpers compiled within it)."""

    def __init__(self) -> None:
        self.started: dict[tuple, float] = {}
        self.compiled: list[dict] = []

    def listener(self):
        from numba.core import event

        recorder = self

        class Listener(event.Listener):
            def on_start(self, ev):
                recorder.started[_key(ev)] = time.perf_counter()

            def on_end(self, ev):
                name = _name(ev.data["dispatcher"])
                seconds = time.perf_counter() - recorder.started.pop(_key(ev), time.perf_counter())
                if name.startswith("lshjob."):
                    recorder.compiled.append({"kernel": name, "types": str(ev.data["args"]),
                                              "seconds": round(seconds, 3)})

        return Listener()


def _key(ev) -> tuple:
    return id(ev.data["dispatcher"]), str(ev.data["args"])


def _name(dispatcher) -> str:
    func = dispatcher.py_func
    return f"{func.__module__}.{func.__qualname__}"


def fill_cache(folder: str | Path | None = None) -> dict:
    """Compile every kernel the job uses, for the types it uses them with, by running each
    command (sign in both schemes, with weights, segments and periods, in parts; merge; plan;
    run on text, integer and sparse integer keys, weighted, in parts, at threshold 1; audit)
    on a tiny generated data set in a temporary folder (or ``folder``). Returns what was
    compiled, the seconds and the cache folder."""
    import numba
    from numba.core import event

    from lshjob.errors import ParameterError

    if numba.config.CACHE_DIR:  # numba would quietly compile into another folder instead
        try:
            os.makedirs(numba.config.CACHE_DIR, exist_ok=True)
            tempfile.TemporaryFile(dir=numba.config.CACHE_DIR).close()
        except OSError as exc:
            raise ParameterError(f"compile cache folder {numba.config.CACHE_DIR} (LSHJOB_CACHE_DIR or "
                                 f"NUMBA_CACHE_DIR): cannot write there: {exc.strerror or exc}") from None
    recorder = _Recorder()
    compile_cache.NOTICE.enabled = False  # the command reports what it compiles itself
    started = time.perf_counter()
    try:
        with event.install_listener("numba:compile", recorder.listener()):
            if folder is None:
                with tempfile.TemporaryDirectory(prefix="lshjob-kernels-") as tmp:
                    steps = exercise(Path(tmp))
            else:
                steps = exercise(Path(folder))
    finally:
        compile_cache.NOTICE.enabled = True
    return {
        "cache_dir": compile_cache.cache_folder(),
        "compiled": recorder.compiled,
        "kernels_compiled": len({c["kernel"] for c in recorder.compiled}),
        "steps": steps,
        "seconds": round(time.perf_counter() - started, 2),
    }
