"""Conformance checks every band, join and verify engine passes.

Each ``check_*`` function takes an engine (:mod:`lshjob.index.engines`), runs it on small
seeded data, and raises ``AssertionError`` naming the rule broken. The oracles are written
apart from the engines: bucket keys in Python integers from the definition in
:mod:`lshjob.index.band.base`, pairs of buckets with ``itertools`` and ``collections.Counter``,
Jaccard with Python sets (``len(a & b) / len(a | b)``). ``tests/test_engines.py`` runs them
over every registered engine; a package that registers an engine runs them too. A whole run
with chosen engines against the default ones: :func:`lshjob.jobs.conformance.check_index`.
"""

from __future__ import annotations

import tempfile
from collections import Counter
from contextlib import contextmanager
from dataclasses import replace
from itertools import combinations, pairwise
from pathlib import Path

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.index._crowd_checks import crowd_rows, crowds_of
from lshjob.index.band.base import BAND_MULTIPLIER, BUCKET_ROWS_SCHEMA, save_keys
from lshjob.index.join.base import CANDIDATES_SCHEMA, SKEW_COLUMNS, JoinSettings
from lshjob.index.verify.base import VERIFIED_SCHEMA, VerifySettings
from lshjob.sign.signatures import SignatureParams, comparable, sign_membership

MASK = (1 << 64) - 1


def fmix64_int(h: int) -> int:
    """MurmurHash3's 64-bit finaliser in Python integers (Appleby, MurmurHash3.cpp, fmix64)."""
    h ^= h >> 33
    h = (h * 0xFF51AFD7ED558CCD) & MASK
    h ^= h >> 33
    h = (h * 0xC4CEB9FE1A85EC53) & MASK
    return h ^ (h >> 33)


def reference_keys(signatures: np.ndarray, bands: int, rows: int) -> list[list[int]]:
    """Bucket key of each band of each signature (n x k), from the definition in Python integers."""
    out = []
    for v in signatures.tolist():
        keys = []
        for j in range(bands):
            h = j
            for t in range(rows):
                h = (h * BAND_MULTIPLIER + int(v[j * rows + t])) & MASK
            keys.append(fmix64_int(h))
        out.append(keys)
    return out


def reference_bucket_rows(signatures: np.ndarray, reps: np.ndarray, bands: int, rows: int) -> pl.DataFrame:
    """Every bucket row (``band``, ``bucket``, ``rep``) of the signatures (n x k) of ``reps``."""
    keys = reference_keys(signatures, bands, rows)
    return pl.DataFrame(
        {"band": [j for _ in keys for j in range(bands)],
         "bucket": [key for row in keys for key in row],
         "rep": [int(r) for r in reps for _ in range(bands)]},
        schema=BUCKET_ROWS_SCHEMA)


def reference_candidates(bucket_rows: pl.DataFrame, bands: int, max_bucket: int) -> tuple[dict, dict]:
    """Brute force over every bucket row (buckets of one included): (pairs, skew). A bucket over
    ``max_bucket`` is split by its members' buckets in the next band ((j + 1) mod b); pairs
    are taken in buckets and sub-buckets of 2 to ``max_bucket`` members, and ``pairs`` maps
    (left, right) to the number of them the pair met in. ``skew``: the join's skew report."""
    members: dict[tuple[int, int], list[int]] = {}
    bucket_of: dict[tuple[int, int], int] = {}
    for band, bucket, rep in bucket_rows.select("band", "bucket", "rep").iter_rows():
        members.setdefault((band, bucket), []).append(rep)
        bucket_of[(rep, band)] = bucket
    pairs: Counter = Counter()
    sizes = {key: len(reps) for key, reps in members.items()}
    shared = [s for s in sizes.values() if s >= 2]
    split_pairs, oversize_subs = 0, 0
    for (band, _bucket), reps in members.items():
        groups = [reps] if len(reps) <= max_bucket else None
        if groups is None:
            subs: dict[int, list[int]] = {}
            for rep in reps:
                subs.setdefault(bucket_of[(rep, (band + 1) % bands)], []).append(rep)
            groups = [g for g in subs.values() if len(g) <= max_bucket]
            split_pairs += sum(len(g) * (len(g) - 1) // 2 for g in groups)
            oversize_subs += sum(len(g) > max_bucket for g in subs.values())
        for group in groups:
            pairs.update(combinations(sorted(group), 2))
    over = [s for s in shared if s > max_bucket]
    oversize_pairs = sum(s * (s - 1) // 2 for s in over)
    skew = {
        "buckets": len(sizes), "buckets_with_pairs": len(shared), "oversize_buckets": len(over),
        "oversize_rows": sum(over), "oversize_pairs": oversize_pairs, "split_pairs": split_pairs,
        "skipped_pairs": oversize_pairs - split_pairs, "oversize_sub_buckets": oversize_subs,
        "bucket_pairs": sum(s * (s - 1) // 2 for s in shared if s <= max_bucket),
        "largest_bucket": max(shared, default=0), "max_bucket": max_bucket,
    }
    return dict(pairs), skew


def check_contract(table: pl.DataFrame, name: str, schema: dict, rules: list[tuple[str, pl.Expr]]) -> None:
    """The table has exactly ``schema`` (names, order, types) and every row keeps every rule."""
    got = dict(table.schema)
    if got != schema:
        raise AssertionError(f"{name}: schema is {got}; the contract is {schema}")
    for rule, expr in rules:
        broken = table.filter(~expr).height
        if broken:
            raise AssertionError(f"{name}: {broken} rows break the rule {rule!r}")


def _expect(ok: bool, rule: str, detail: str = "") -> None:
    if not ok:
        raise AssertionError(f"{rule}{': ' + detail if detail else ''}")


@contextmanager
def _folder(folder: Path | None):
    if folder is not None:
        folder.mkdir(parents=True, exist_ok=True)
        yield folder
        return
    with tempfile.TemporaryDirectory(prefix="lshjob-conformance-") as tmp:
        yield Path(tmp)


# ---------------------------------------------------------------------------------------- band

def check_band(engine, folder: Path | None = None) -> None:
    """Keys follow the definition; shared rows are exactly the rows of buckets of two or more,
    given the key table whole, in slices, or in slices saved to files."""
    # Values near 2**64, so every product and sum wraps; representatives with gaps in their ids.
    rng = np.random.default_rng(3)
    sig = rng.integers(2**63, 2**64 - 1, size=(7, 12), dtype=np.uint64)
    sig[0, :] = 2**64 - 1
    reps = np.arange(7, dtype=np.int64) * 5 + 100
    keys = engine.keys(np.ascontiguousarray(sig.T), reps, 3, 4)
    _expect(keys.columns == ["rep", "0", "1", "2"], "keys: columns are rep and one per band, by number",
            str(keys.columns))
    _expect(keys["rep"].to_list() == reps.tolist(), "keys: rep is each representative, in order")
    _expect(all(keys[c].dtype == pl.UInt64 for c in ("0", "1", "2")), "keys: bucket keys are UInt64")
    expected = reference_keys(sig, 3, 4)
    for j in range(3):
        _expect(keys[str(j)].to_list() == [row[j] for row in expected],
                f"keys: band {j} follows the definition (Horner mod 2**64, then fmix64)")

    # Few signature values: many shared buckets; and rows of random values: many of one.
    rng = np.random.default_rng(6)
    sig = rng.integers(0, 3, size=(500, 8), dtype=np.uint64)
    sig[:100] = rng.integers(0, 2**63, size=(100, 8), dtype=np.uint64)
    reps = np.arange(500, dtype=np.int64) * 3 + 7
    every = reference_bucket_rows(sig, reps, 4, 2)  # oracle: the definition, grouped by polars
    expected = every.filter(pl.len().over("band", "bucket") >= 2).sort("band", "bucket", "rep")
    cuts = [(0, 150), (150, 151), (151, 500)]
    slices = [engine.keys(np.ascontiguousarray(sig[a:b].T), reps[a:b], 4, 2) for a, b in cuts]
    with _folder(folder) as tmp:
        saved = [save_keys(s, tmp / f"keys-{n}.parquet") for n, s in enumerate(slices)]
        for how, given in (("whole", [pl.concat(slices)]), ("slices", slices), ("saved slices", saved)):
            out = engine.shared_rows(given, 4, tmp / f"buckets-{how.replace(' ', '-')}", batch_bytes=500 * 28 * 3)
            got = pl.read_parquet(out.files) if out.files else pl.DataFrame(schema=BUCKET_ROWS_SCHEMA)
            check_contract(got, f"bucket rows ({how})", BUCKET_ROWS_SCHEMA, [])
            got = got.sort("band", "bucket", "rep")
            _expect(got.equals(expected), f"bucket rows ({how}): exactly the rows of buckets of two or more",
                    f"{got.height} rows, expected {expected.height}")
            _expect(out.rows_written == got.height, f"bucket rows ({how}): rows_written counts the rows written")
            _expect(out.rows_total == 500 * 4, f"bucket rows ({how}): rows_total = representatives x bands",
                    str(out.rows_total))


# ---------------------------------------------------------------------------------------- join

def join_input(seed: int = 5, reps: int = 60, bands: int = 4) -> pl.DataFrame:
    """Every bucket row of ``reps`` representatives (ids with gaps): skewed bucket choices, so
    that with a cap of 8 some buckets are oversize, some of their sub-buckets fit and some do not."""
    rng = np.random.default_rng(seed)
    ids = np.arange(reps, dtype=np.int64) * 2 + 11
    weights = np.array([0.45, 0.2, 0.15, 0.1, 0.05, 0.05])
    rows = []
    for j in range(bands):
        choice = rng.choice(len(weights), size=reps, p=weights)
        alone = rng.random(reps) < 0.1
        choice[alone] = 100 + np.flatnonzero(alone)  # a few in buckets of their own
        for rep, c in zip(ids.tolist(), choice.tolist()):
            rows.append((j, fmix64_int(j * 1000 + int(c) + 1), rep))
    return pl.DataFrame(rows, schema=BUCKET_ROWS_SCHEMA, orient="row")


def _read_candidates(out, ranges) -> tuple[pl.DataFrame, list[tuple[int, int, pl.DataFrame]]]:
    if ranges is None:
        _expect(Path(out.candidates).is_file(), "candidates: one Parquet file without ranges")
        return pl.read_parquet(out.candidates), []
    blocks = []
    for folder in sorted(Path(out.candidates).glob("left_part=*/right_part=*")):
        i = int(folder.parent.name.split("=")[1])
        j = int(folder.name.split("=")[1])
        files = sorted(folder.glob("*.parquet"))
        if files:
            blocks.append((i, j, pl.read_parquet(files, hive_partitioning=False)))
    whole = pl.concat([b for _, _, b in blocks]) if blocks else pl.DataFrame(schema=CANDIDATES_SCHEMA)
    return whole, blocks


def _check_join_case(engine, tmp: Path, name: str, every: pl.DataFrame, shared: pl.DataFrame, bands: int,
                     settings: JoinSettings, ranges) -> None:
    files = []
    for n, (start, stop) in enumerate(((0, shared.height // 2), (shared.height // 2, shared.height))):
        path = tmp / f"{name}-buckets-{n}.parquet"
        shared.slice(start, stop - start).write_parquet(path)
        files.append(path)
    for split in (None, ranges):
        how = f"{name}, {'whole' if split is None else 'split by ranges'}"
        target = tmp / f"{name}-candidates{'' if split is None else '-ranges'}"
        target = target.with_suffix(".parquet") if split is None else target
        out = engine.candidates(files, bands, target, settings, bucket_rows=every.height, ranges=split)
        table, blocks = _read_candidates(out, split)
        crowded = crowd_rows(out.crowds)
        # an engine listing crowds takes the crowd cap (lshjob.index.join.base)
        pairs, skew = reference_candidates(every, bands, settings.crowd_cap() if out.crowds else settings.max_bucket)
        check_contract(table, f"candidates ({how})", CANDIDATES_SCHEMA,
                       [("left_rep < right_rep", pl.col("left_rep") < pl.col("right_rep")),
                        ("bands_shared >= 1", pl.col("bands_shared") >= 1)])
        got: dict[tuple[int, int], int] = {}
        for a, b, s in [*table.iter_rows(), *crowded]:  # a pair may take a row per band: its rows' sum
            got[(a, b)] = got.get((a, b), 0) + s
        _expect(got == pairs, f"candidates ({how}): the pairs of buckets within the cap and of sub-buckets of "
                "oversize ones, counted per pair", f"{len(got)} pairs, expected {len(pairs)}")
        _expect(out.pairs == table.height + len(crowded), f"candidates ({how}): pairs counts the rows and "
                "the pairs of crowds", str(out.pairs))
        report = {k: int(out.skew[k]) for k in (*SKEW_COLUMNS, "max_bucket") if k in out.skew}
        _expect(report == skew, f"skew ({how}): the counts of buckets, oversize buckets and their split",
                f"{report} against {skew}")
        for i, j, block in blocks:
            (a, b), (c, d) = split[i], split[j]
            _expect(i <= j, f"candidates ({how}): left_part <= right_part")
            _expect(block["left_rep"].is_between(a, b).all() and block["right_rep"].is_between(c, d).all(),
                    f"candidates ({how}): block left_part={i}/right_part={j} holds the pairs of those ranges")


def check_join(engine, folder: Path | None = None) -> None:
    """Candidates and skew equal brute force over the bucket rows (oversize buckets split by
    the next band); split by ranges, the same pairs; no shared bucket, no pair."""
    every = join_input()
    shared = every.filter(pl.len().over("band", "bucket") >= 2)  # what the band stage writes
    ids = every["rep"].unique().sort().to_list()
    ranges = [(0, ids[19]), (ids[19] + 1, ids[41]), (ids[41] + 1, ids[-1] + 5)]
    with _folder(folder) as tmp:
        settings = JoinSettings(memory_limit="512MB", temp_directory=str(tmp / "spill"), threads=2, max_bucket=8)
        oversize = every.group_by("band", "bucket").len().filter(pl.col("len") > 8).height
        _expect(oversize > 0, "check_join's input has oversize buckets")
        _check_join_case(engine, tmp, "skewed", every, shared, 4, settings, ranges)
        # a large join whose pairs rarely repeat: the engine may write a row per band
        rows_per_band = replace(settings, dedupe_up_to=0, max_repeat=4.0)
        _check_join_case(engine, tmp, "rows-per-band", every, shared, 4, rows_per_band, ranges)
        # and may list the members of large buckets (crowds) instead of their pairs
        _check_join_case(engine, tmp, "crowds", every, shared, 4, replace(rows_per_band, crowd_size=4, max_crowd=8),
                         ranges)
        # crowds up to a larger cap than the pairs it writes (the largest bucket still over it)
        _check_join_case(engine, tmp, "large-crowds", every, shared, 4,
                         replace(rows_per_band, crowd_size=4, max_crowd=20), ranges)

        alone = pl.DataFrame({"band": [0, 0, 1, 1], "bucket": [1, 2, 3, 4], "rep": [11, 13, 11, 13]},
                             schema=BUCKET_ROWS_SCHEMA)
        _check_join_case(engine, tmp, "no-shared-bucket", alone, alone.clear(), 2, settings, [(0, 12), (13, 20)])


# -------------------------------------------------------------------------------------- verify

class HeldRanges:
    """Sets by consecutive ranges of entity ids (:class:`lshjob.index.verify.base.SetStore`)."""

    def __init__(self, sets: ElementSets, cuts: list[int]) -> None:
        bounds = [0, *cuts, sets.size]
        self.ranges = [(a, b - 1) for a, b in pairwise(bounds)]
        self.parts = [sets.subset(np.arange(a, b + 1)) for a, b in self.ranges]

    def load(self, i: int) -> ElementSets:
        return self.parts[i]


def verify_input(seed: int = 4, entities: int = 240) -> tuple[ElementSets, list[set[int]], pl.DataFrame]:
    """Sets drawn around a few themes (many pairs near any threshold, a few identical) and
    candidate pairs among them."""
    rng = np.random.default_rng(seed)
    themes = [rng.choice(80, size=20, replace=False) for _ in range(6)]
    sets = []
    for i in range(entities):
        theme = themes[i % len(themes)]
        own = set(rng.choice(theme, size=int(rng.integers(1, 18)), replace=False).tolist())
        own |= set(rng.integers(80, 200, size=int(rng.integers(0, 4))).tolist())
        sets.append(own)
    sets[7] = set(sets[1])  # identical sets
    sets[200] = set(sets[1])
    frame = pl.DataFrame({"entity": np.repeat(np.arange(entities), [len(s) for s in sets]),
                          "element": [e for s in sets for e in sorted(s)]})
    left = rng.integers(0, entities, size=3000)
    right = rng.integers(0, entities, size=3000)
    keep = left != right
    pairs = pl.DataFrame({"left_rep": np.minimum(left, right)[keep], "right_rep": np.maximum(left, right)[keep]})
    pairs = pl.concat([pairs, pl.DataFrame({"left_rep": [1, 1, 7], "right_rep": [7, 200, 200]})]).unique()
    pairs = pairs.with_columns(bands_shared=pl.Series(rng.integers(1, 6, size=pairs.height), dtype=pl.Int32))
    return ElementSets.from_sets(frame), sets, pairs.cast(CANDIDATES_SCHEMA)


def _write_blocks(pairs: pl.DataFrame, ranges: list[tuple[int, int]], out: Path) -> Path:
    firsts = np.array([a for a, _ in ranges])
    parted = pairs.with_columns(
        left_part=pl.Series(np.searchsorted(firsts, pairs["left_rep"].to_numpy(), side="right") - 1),
        right_part=pl.Series(np.searchsorted(firsts, pairs["right_rep"].to_numpy(), side="right") - 1))
    for (i, j), block in parted.group_by("left_part", "right_part"):
        folder = out / f"left_part={i}" / f"right_part={j}"
        folder.mkdir(parents=True, exist_ok=True)
        block.select(*CANDIDATES_SCHEMA).write_parquet(folder / "pairs.parquet")
    return out


def check_verify(engine, folder: Path | None = None) -> None:
    """Verified pairs are exactly the candidates whose set Jaccard reaches the threshold, with
    that Jaccard and the signatures' fraction of equal positions; one range and several agree."""
    sets, python_sets, pairs = verify_input()
    params = SignatureParams(perms=32, seed=3)
    threshold = 0.4
    ids = np.arange(sets.size)
    signatures = comparable(sign_membership(sets, ids, params), params)  # oracle of the estimate
    expected = {}
    for a, b, shared in pairs.iter_rows():
        jac = len(python_sets[a] & python_sets[b]) / len(python_sets[a] | python_sets[b])
        if jac >= threshold:
            expected[(a, b)] = (jac, float(np.mean(signatures[a] == signatures[b])), shared)
    _expect(0 < len(expected) < pairs.height, "check_verify's candidates hold pairs on both sides of the threshold")
    rules = [("left_rep < right_rep", pl.col("left_rep") < pl.col("right_rep")),
             ("jaccard >= threshold", pl.col("jaccard") >= threshold),
             ("estimate in [0, 1]", pl.col("estimate").is_between(0.0, 1.0))]
    with _folder(folder) as tmp:
        whole = tmp / "candidates.parquet"
        pairs.write_parquet(whole)
        one = HeldRanges(sets, [])
        three = HeldRanges(sets, [90, 91])
        # a row per band the pair met in (a join that leaves deduplication to verification),
        # shuffled so a pair's rows fall in different slices
        per_band = (pairs.with_columns(pl.int_ranges(0, "bands_shared").alias("row")).explode("row")
                    .with_columns(bands_shared=pl.lit(1, dtype=pl.Int32)).drop("row")
                    .sample(fraction=1.0, shuffle=True, seed=5))
        _expect(per_band.height > pairs.height, "check_verify's candidates have pairs met in several bands")
        cases = (("one range", whole, one, VerifySettings(slice_rows=1 << 20), None),
                 ("three ranges, small slices", _write_blocks(pairs, three.ranges, tmp / "blocks"), three,
                  VerifySettings(slice_rows=97, estimate_bytes=1), None),
                 ("a row per band, three ranges, small slices",
                  _write_blocks(per_band, three.ranges, tmp / "per-band"), three,
                  VerifySettings(slice_rows=97, estimate_bytes=1), None))
        crowds, crowd_pairs = crowds_of(sets.size, tmp / "crowds.parquet")
        cases += tuple((f"crowds, {how}", candidates, store, settings, crowds)
                       for how, candidates, store, settings, _ in cases[1:])
        summed: Counter = Counter()
        for a, b, shared in [*pairs.iter_rows(), *crowd_pairs]:  # bands summed over the pair's rows
            summed[(a, b)] += shared
        with_crowds = {}
        for (a, b), shared in summed.items():
            jac = len(python_sets[a] & python_sets[b]) / len(python_sets[a] | python_sets[b])
            if jac >= threshold:  # oracle: Python sets
                with_crowds[(a, b)] = (jac, float(np.mean(signatures[a] == signatures[b])), shared)
        _expect(len(with_crowds) > len(expected), "check_verify's crowds hold pairs over the threshold")
        results = {}
        for how, candidates, store, settings, crowds in cases:
            want = expected if crowds is None else with_crowds
            more = {} if crowds is None else {"crowds": crowds}
            got = engine.verify(candidates, store, threshold, params, settings, **more)
            check_contract(got, f"verified ({how})", VERIFIED_SCHEMA, rules)
            table = {(a, b): (j, e, s) for a, b, j, e, s in got.iter_rows()}
            _expect(len(table) == got.height, f"verified ({how}): each pair once")
            _expect(table.keys() == want.keys(), f"verified ({how}): exactly the candidates with set Jaccard "
                    ">= threshold", f"{len(table)} pairs, expected {len(want)}")
            _expect(all(table[p][0] == want[p][0] for p in table),
                    f"verified ({how}): jaccard = |A & B| / |A | B| exactly")
            _expect(all(table[p][1] == want[p][1] for p in table),
                    f"verified ({how}): estimate = fraction of equal signature positions")
            _expect(all(table[p][2] == want[p][2] for p in table), f"verified ({how}): bands_shared is kept")
            results[how] = got.sort("left_rep", "right_rep")
        _expect(results["one range"].equals(results["three ranges, small slices"]),
                "verified: one range and three ranges give the same rows")
        identical = engine.verify(whole, one, 1.0, None, VerifySettings())
        check_contract(identical, "verified (identical only)", VERIFIED_SCHEMA,
                       [("estimate = jaccard without signatures", pl.col("estimate") == pl.col("jaccard"))])
        same = {(a, b) for a, b, _ in pairs.iter_rows() if python_sets[a] == python_sets[b]}
        _expect({(1, 7), (1, 200), (7, 200)} <= same, "check_verify's candidates hold identical sets")
        _expect(set(identical.select("left_rep", "right_rep").iter_rows()) == same,
                "verified (threshold 1.0): exactly the candidates with identical sets")
