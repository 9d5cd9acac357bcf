"""Shared helpers for benchmarks: machine facts, generated data, timing, RESULTS.md."""

from __future__ import annotations

import os
import platform
import resource
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import polars as pl

CACHE = Path(__file__).parent / "cache"


def machine() -> str:
    mem_gb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (
        f"{platform.machine()}, {os.cpu_count()} cores, {mem_gb:.0f} GiB, Python {platform.python_version()}, "
        f"polars {pl.__version__}, numpy {np.__version__}"
    )


def long_tailed_events(entities: int, mean_size: float = 40.0, seed: int = 0) -> Path:
    """Events (entity, element) with log-normal set sizes (mean ~ mean_size) and
    power-law element popularity; cached as Parquet under bench/cache/."""
    CACHE.mkdir(exist_ok=True)
    path = CACHE / f"events_{entities}_{int(mean_size)}_{seed}.parquet"
    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    sigma = 1.0
    mu = np.log(mean_size) - sigma**2 / 2
    sizes = np.clip(np.round(rng.lognormal(mu, sigma, entities)), 1, 5000).astype(np.int64)
    n = int(sizes.sum())
    universe = max(10_000, entities * 2)
    element = np.minimum((rng.random(n) ** (-1 / 0.7)).astype(np.int64), universe) + rng.integers(0, 50, n) * universe
    frame = pl.DataFrame({"entity": np.repeat(np.arange(entities, dtype=np.int64), sizes), "element": element})
    frame.write_parquet(path)
    return path


@contextmanager
def timed(results: dict, name: str):
    start = time.perf_counter()
    yield
    results[name] = time.perf_counter() - start


def peak_rss_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def finish(section: str, report: str, write: bool) -> None:
    """Print a benchmark's report and, unless told not to, add it to RESULTS.md."""
    print(report)
    if write:
        append_results(f"{section} ({time.strftime('%Y-%m-%d')})", report)


def append_results(section: str, body: str) -> None:
    """Add a section to bench/RESULTS.md, newest first (older runs stay below)."""
    path = Path(__file__).parent / "RESULTS.md"
    header = "# Benchmark results\n\nNewest first. Each section: machine, data, command, figures.\n"
    text = path.read_text() if path.exists() else header
    head, _, rest = text.partition("\n## ")
    rest = ("## " + rest) if rest else ""
    path.write_text(head.rstrip() + f"\n\n## {section}\n\n{body.strip()}\n\n" + rest)


def events_with_similar_pairs(entities: int, mean_size: float = 40.0, share: float = 0.1, seed: int = 0) -> Path:
    """Long-tailed events where a fraction ``share`` of entities are perturbed copies of
    another entity (each element replaced with probability q ~ U(0, 0.6)), so that pair
    similarities spread over (0, 1]; cached under bench/cache/."""
    CACHE.mkdir(exist_ok=True)
    path = CACHE / f"similar_{entities}_{int(mean_size)}_{share}_{seed}.parquet"
    if path.exists():
        return path
    base = pl.read_parquet(long_tailed_events(entities, mean_size, seed))
    rng = np.random.default_rng(seed + 1)
    n_copies = int(entities * share)
    targets = rng.choice(entities, size=n_copies, replace=False)  # entities overwritten
    sources = rng.integers(0, entities, size=n_copies)
    mapping = pl.DataFrame({"entity": sources, "copy": targets})
    copies = base.join(mapping, on="entity").select(pl.col("copy").alias("entity"), "element")
    q = pl.DataFrame({"entity": targets, "q": rng.uniform(0, 0.6, n_copies)})
    copies = copies.join(q, on="entity").with_columns(u=pl.Series(rng.random(copies.height)))
    fresh = pl.Series(rng.integers(10**12, 2 * 10**12, copies.height))
    copies = copies.with_columns(
        element=pl.when(pl.col("u") < pl.col("q")).then(fresh).otherwise(pl.col("element"))
    ).select("entity", "element")
    kept = base.filter(~pl.col("entity").is_in(pl.Series(targets).implode()))
    pl.concat([kept, copies]).sort("entity").write_parquet(path)
    return path
