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


# Runs ``python -m lshjob ...`` from another checkout (argv[1]): an editable install's import
# hook comes before sys.path, so PYTHONPATH alone would still import the installed tree.
FROM_TREE = """
import runpy, sys
tree = sys.argv.pop(1)
sys.meta_path[:] = [f for f in sys.meta_path if "editable" not in repr(f).lower()]
sys.path.insert(0, tree)
runpy.run_module("lshjob", run_name="__main__", alter_sys=True)
"""


def lshjob_command(tree: Path | None = None) -> list[str]:
    """The command that runs lshjob: this environment's, or ``tree``'s (an older checkout)."""
    import sys

    return [sys.executable, "-m", "lshjob"] if tree is None else [sys.executable, "-c", FROM_TREE, str(tree)]


def compile_bytecode(tree: Path | None = None) -> None:
    """Byte-compile the lshjob package that :func:`lshjob_command` runs, as ``pip install`` does
    for an installed copy: with an editable install and PYTHONDONTWRITEBYTECODE set (as on some
    shared machines), every process would otherwise compile the package's sources again
    (about 0.3 s a process, measured)."""
    import subprocess
    import sys

    import lshjob

    package = Path(lshjob.__file__).parent if tree is None else Path(tree) / "lshjob"
    subprocess.run([sys.executable, "-m", "compileall", "-q", str(package)], check=True, capture_output=True)


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


BRANCH_PATRONS = 10_000


def branch_network_events(entities: int, mean_size: float = 40.0, seed: int = 0) -> Path:
    """A library network that grows by branches: a directory of Parquet files of
    (entity, element) loans, generated a million patrons at a time (memory stays bounded at
    any size) and cached under bench/cache/.

    Each branch serves 10,000 patrons. A loan is of a title from the patron's own branch
    catalogue with probability 0.85 (power-law popularity, as in :func:`long_tailed_events`)
    and otherwise of a title from the network-wide catalogue (uniform over 20 titles per
    patron). Set sizes are log-normal with mean ~mean_size; 10% of patrons are perturbed
    copies of another patron of their branch (each loan replaced with probability
    q ~ U(0, 0.6)). Patron numbers are a random permutation, so the file order says nothing.

    Why branches: with one shared catalogue, the number of pairs above any threshold grows
    with the square of the patron count and no method can be near-linear; here each patron
    has a bounded number of look-alikes, as in a network that grows by adding branches.
    """
    CACHE.mkdir(exist_ok=True)
    root = CACHE / f"branches_{entities}_{int(mean_size)}_{seed}"
    if (root / "_done").exists():
        return root
    root.mkdir(exist_ok=True)
    rng = np.random.default_rng(seed)
    patron_ids = rng.permutation(entities).astype(np.int64)
    step = 1_000_000
    for part, first in enumerate(range(0, entities, step)):
        n = min(step, entities - first)
        _branch_chunk(first, n, patron_ids, mean_size, np.random.default_rng([seed, part])).write_parquet(
            root / f"loans-{part:04d}.parquet", compression="zstd")
    (root / "_done").touch()
    return root


def _branch_chunk(first, n, patron_ids, mean_size, rng) -> pl.DataFrame:
    sigma = 1.0
    mu = np.log(mean_size) - sigma**2 / 2
    sizes = np.clip(np.round(rng.lognormal(mu, sigma, n)), 1, 5000).astype(np.int64)
    local_index = np.arange(first, first + n)
    branch = local_index // BRANCH_PATRONS
    # perturbed copies: 10% of patrons copy another patron of the same branch
    copy = rng.random(n) < 0.1
    source = np.where(copy, branch * BRANCH_PATRONS + rng.integers(0, BRANCH_PATRONS, n) - first, np.arange(n))
    source = np.clip(source, 0, n - 1)
    sizes = np.where(copy, sizes[source], sizes)
    total = int(sizes.sum())
    owner = np.repeat(np.arange(n), sizes)
    # loans of the "source" patron are drawn by the source's own stream: rebuild per owner
    src_owner = source[owner]
    row_in_set = np.arange(total) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    key = src_owner * 5000 + row_in_set  # same (source, position) -> same loan
    u = _uniform_from_key(key, 1)
    universe = 2 * BRANCH_PATRONS
    local = (np.minimum((u ** (-1 / 0.7)).astype(np.int64), universe)
             + (_uniform_from_key(key, 2) * 50).astype(np.int64) * universe)
    local_title = (first + src_owner) // BRANCH_PATRONS * (50 * universe + 1) + local
    global_title = 10**12 + (_uniform_from_key(key, 3) * 20 * len(patron_ids)).astype(np.int64)
    title = np.where(_uniform_from_key(key, 4) < 0.85, local_title, global_title)
    q = rng.uniform(0, 0.6, n)[owner]
    replaced = copy[owner] & (rng.random(total) < q)
    title = np.where(replaced, 2 * 10**12 + rng.integers(0, 10**12, total), title)
    return pl.DataFrame({"entity": patron_ids[first + owner], "element": title})


def _uniform_from_key(key: np.ndarray, stream: int) -> np.ndarray:
    """Uniforms in (0, 1) from a keyed mix (SplitMix64 finaliser), so a copy draws its
    source's loans without storing them."""
    z = (key.astype(np.uint64) * np.uint64(4) + np.uint64(stream)) * np.uint64(0x9E3779B97F4A7C15)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    z = z ^ (z >> np.uint64(31))
    return ((z >> np.uint64(11)).astype(np.float64) + 0.5) / 2.0**53


def best(fn, repeat: int) -> tuple[float, float]:
    """(wall, CPU) seconds of the best of ``repeat`` calls of ``fn``, after one untimed call
    (compiled code and caches outside timing)."""
    fn()
    wall, cpu = [], []
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - w)
        cpu.append(time.process_time() - c)
    return min(wall), min(cpu)


def zipf_events(entities: int, exponent: float = 1.2, copies: float = 0.2, seed: int = 0) -> Path:
    """Long-tailed events (entity, element), cached under bench/cache/: one Parquet file up to
    ZIPF_CHUNK entities, above it a directory of one file a chunk of ZIPF_CHUNK entities.

    Element popularity close to Zipf (P(rank i) ~ i**-exponent over a catalogue of
    2 x entities titles; draws beyond it are spread uniformly over the catalogue); set sizes
    log-normal (median 6, mean ~20), so about half the entities hold 1-5 elements, mostly
    popular ones; a fraction ``copies`` of entities are near-copies of another entity (each
    element replaced with probability q ~ U(0, 0.4)). One row per (entity, element). In
    chunks, a copy's source is an entity of its own chunk (the catalogue stays the whole
    one), so 10M entities are made in the memory 2M take (one shot at 10M, about 144M
    events, was killed at 24 GB resident). Up to ZIPF_CHUNK, the data are those of one shot.
    """
    CACHE.mkdir(exist_ok=True)
    name = f"zipf_{entities}_{exponent}_{copies}_{seed}"
    if entities <= ZIPF_CHUNK:
        path = CACHE / f"{name}.parquet"
        if not path.exists():
            _zipf_chunk(0, entities, 2 * entities, exponent, copies, np.random.default_rng(seed)).write_parquet(path)
        return path
    root = CACHE / name
    if (root / "_done").exists():
        return root
    root.mkdir(exist_ok=True)
    for part, first in enumerate(range(0, entities, ZIPF_CHUNK)):
        n = min(ZIPF_CHUNK, entities - first)
        _zipf_chunk(first, n, 2 * entities, exponent, copies, np.random.default_rng([seed, part])).write_parquet(
            root / f"events-{part:04d}.parquet")
    (root / "_done").write_text("")
    return root


ZIPF_CHUNK = 2_000_000


def as_text_keys(events: Path) -> Path:
    """The same events with text keys, as data from a service holds them: patron ``p-<id>``
    and title ``t-<id>`` (cached beside them; one file)."""
    path = events.with_name(f"{events.stem}_text.parquet")
    if not path.exists():
        frame = pl.read_parquet(events)
        frame.select(pl.format("p-{}", "entity").alias("entity"),
                     pl.format("t-{}", "element").alias("element")).write_parquet(path)
    return path


def _zipf_chunk(first: int, entities: int, catalogue: int, exponent: float, copies: float,
                rng: np.random.Generator) -> pl.DataFrame:
    """Entities first..first+entities-1 of :func:`zipf_events`, sorted by (entity, element)."""
    sizes = np.clip(np.round(rng.lognormal(np.log(6.0), 1.6, entities)), 1, 5000).astype(np.int64)
    n = int(sizes.sum())
    element = rng.zipf(exponent, n).astype(np.int64)
    far = element > catalogue
    element[far] = rng.integers(1, catalogue + 1, int(far.sum()))
    base = pl.DataFrame({"entity": np.repeat(np.arange(first, first + entities, dtype=np.int64), sizes),
                         "element": element})
    n_copies = int(entities * copies)
    targets = first + rng.choice(entities, size=n_copies, replace=False)
    sources = first + rng.integers(0, entities, size=n_copies)
    mapping = pl.DataFrame({"entity": sources, "copy": targets, "q": rng.uniform(0, 0.4, n_copies)})
    dup = base.join(mapping, on="entity").select(pl.col("copy").alias("entity"), "element", "q")
    dup = dup.with_columns(u=pl.Series(rng.random(dup.height)),
                           fresh=pl.Series(rng.integers(catalogue + 1, 50 * catalogue, dup.height)))
    dup = dup.select("entity", element=pl.when(pl.col("u") < pl.col("q")).then("fresh").otherwise("element"))
    kept = base.filter(~pl.col("entity").is_in(pl.Series(targets).implode()))
    return pl.concat([kept, dup]).unique(maintain_order=False).sort("entity", "element")
