"""A whole run with chosen engines against the default engines.

The stage checks (:mod:`lshjob.index.conformance`) hold an engine to each stage's contract;
:func:`check_index` runs ``lshjob run`` end to end with the chosen engines, in one part and in
key ranges, and requires the very neighbours the default engines publish in one part: on
sets drawn around themes, and on the library demo (:mod:`lshjob.demo.generate`).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.demo.generate import generate_events
from lshjob.index.engines import DEFAULT_ENGINES, check_all
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.run import RunOptions, run_job

SPEC = EventSpec(entity="patron", element="title")
# An explicit plan, so that the run in key ranges (whose planner sees a sample) bands alike.
OPTIONS = {"threshold": 0.4, "top_k": 20, "perms": 64, "bands": 16, "rows": 4}


def themed_loans(patrons: int = 300, seed: int = 2) -> pl.DataFrame:
    """Loans (patron, title) of patrons each borrowing from one of a few reading themes, plus
    a few titles of their own, and some patrons with the same loans."""
    rng = np.random.default_rng(seed)
    themes = [[f"theme{t}-title{i}" for i in range(25)] for t in range(8)]
    rows = []
    for p in range(patrons):
        theme = themes[int(rng.integers(len(themes)))]
        picked = rng.choice(len(theme), size=int(rng.integers(2, 16)), replace=False)
        titles = {theme[i] for i in picked} | {f"own{p}-{i}" for i in range(int(rng.integers(0, 3)))}
        rows += [(f"patron{p:04d}", t) for t in sorted(titles)]
    rows += [(f"twin{p}", t) for p in range(3) for t in ("theme0-title1", "theme0-title2")]
    return pl.DataFrame(rows, schema=["patron", "title"], orient="row")


def check_index(engines: dict[str, str], folder: Path | None = None) -> None:
    """The run with ``engines`` (stage -> name; stages left out take the default), in one part
    and in three key ranges, publishes the same neighbours as the default engines in one part;
    raises AssertionError naming the data and the run that differ."""
    check_all(engines)
    datasets = (("themed loans", themed_loans()), ("library demo", generate_events(300, seed=11)[0]))
    with tempfile.TemporaryDirectory(prefix="lshjob-conformance-") as tmp:
        tmp = Path(folder) if folder is not None else Path(tmp)
        for name, events in datasets:
            base = tmp / name.replace(" ", "-")
            base.mkdir(parents=True, exist_ok=True)
            src = base / "loans.parquet"
            events.select("patron", "title").write_parquet(src)
            run_job(src, SPEC, RunOptions(**OPTIONS, engines=dict(DEFAULT_ENGINES)), base / "default")
            expected = pl.read_parquet(base / "default" / "neighbours.parquet")
            if expected.height == 0:
                raise AssertionError(f"{name}: the default engines published no pair (check_index needs some)")
            for parts in (1, 3):
                out = base / f"chosen-{parts}"
                manifest = run_job(src, SPEC, RunOptions(**OPTIONS, parts=parts, engines=dict(engines)), out)
                if manifest["engines"] != {**DEFAULT_ENGINES, **engines}:
                    raise AssertionError(f"{name}: the manifest records engines {manifest['engines']}")
                got = pl.read_parquet(out / "neighbours.parquet")
                if not got.equals(expected):
                    raise AssertionError(
                        f"{name}: engines {engines} in {parts} part(s) published {got.height} neighbour rows "
                        f"unlike the default engines' {expected.height}")
