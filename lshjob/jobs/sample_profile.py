"""What a sample holds under a plan, for the forecast scaled from it
(:class:`lshjob.plan.scaling.SampleProfile`): identical sets collapsed as the run collapses
them (:func:`lshjob.index.collapse.collapse_identical`), the representatives signed and cut
into bands as the run signs and bands them, the sizes of the buckets they share, and the
similar pairs those buckets would find at full size (:func:`similar_found`)."""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.index.band.local import bucket_keys_by_position
from lshjob.index.collapse import collapse_identical
from lshjob.index.verify._jaccard import exact_jaccard
from lshjob.jobs.options import default_of
from lshjob.plan.scaling import SampleProfile
from lshjob.plan.similarity import postings_of, restricted_index, visit_costs
from lshjob.sign.signatures import SignatureParams, comparable_by_position

SLICE_REPS = 100_000  # representatives signed at a time (their positions: 8 x b x r bytes each)
PAIR_ROWS = 16_000_000  # ordered pairs of shared buckets looked at, at most (a uniform share of the left members)


def sample_profile(sets: ElementSets, perms: int, bands: int, rows: int, scheme: str | None = None,
                   seed: int | None = None, threshold: float | None = None) -> SampleProfile:
    """The profile of ``sets`` (a uniform sample of the entities) under the plan (k, b, r);
    ``scheme`` and ``seed`` the run's (default: the run's defaults); with ``threshold``, the
    similar pairs its buckets find (:func:`similar_found`)."""
    rep_of, reps = collapse_identical(sets)
    multiplicities = np.bincount(rep_of, minlength=sets.size)[reps]
    params = SignatureParams(scheme=scheme or default_of("scheme"), perms=perms,
                             seed=default_of("seed") if seed is None else seed)
    once = pl.Series("once", multiplicities[np.arange(len(reps))] == 1 if len(reps) else [], dtype=pl.UInt32)
    keys = []
    for lo, hi in slice_bounds(len(reps), SLICE_REPS):
        ids = reps[lo:hi]
        columns = comparable_by_position(sets, ids, params, bands * rows)
        keys.append(bucket_keys_by_position(columns, ids, bands, rows))
        del columns
    table = pl.concat(keys).with_columns(once) if keys else pl.DataFrame()
    shapes = [table.group_by(name).agg(members=pl.len(), single=pl.col("once").sum())
              .filter(pl.col("members") >= 2).select(repeated=pl.col("members") - pl.col("single"), single="single")
              for name in table.columns if name not in ("once", "rep")]
    found = (pl.concat(shapes).group_by("repeated", "single").agg(buckets=pl.len()) if shapes else
             pl.DataFrame({"repeated": [], "single": [], "buckets": []}, schema={"repeated": pl.UInt32,
                                                                                 "single": pl.UInt32,
                                                                                 "buckets": pl.UInt32}))
    return SampleProfile(entities=int(sets.size), multiplicities=multiplicities,
                         bucket_repeated=found["repeated"].to_numpy().astype(np.int64),
                         bucket_single=found["single"].to_numpy().astype(np.int64),
                         bucket_counts=found["buckets"].to_numpy().astype(np.int64), bands=bands,
                         planner_visits=planner_visits(sets),
                         similar_found=None if threshold is None or not keys else
                         lambda weight, max_bucket: similar_found(table, sets, threshold, weight, max_bucket))


def similar_found(table: pl.DataFrame, sets: ElementSets, threshold: float, weight, max_bucket: float,
                  limit: int = PAIR_ROWS) -> tuple[np.ndarray, np.ndarray, float]:
    """The sample's pairs of Jaccard similarity at least ``threshold`` that share a bucket of
    at most ``max_bucket`` members at full size (the join skips larger ones), as (first
    members, second members, share looked at): positions in ``table``, each pair in both
    orders. A bucket's size at full size is the sum of its members' weights: ``weight``, one a
    representative in the order of ``table``, or one number for those seen once (1 for the
    others; :mod:`lshjob.plan.sample_weights`). ``table``: the sample's key table (``rep``,
    ``once``, a column a band). A pair that meets in several bands is there once: it is
    verified if any of its buckets is kept. When the kept buckets hold more than ``limit``
    ordered pairs, only those whose first member is in a uniform share of the representatives
    are looked at (the share returned)."""
    n = table.height
    once = table["once"].to_numpy().astype(bool)
    weights = (np.asarray(weight, dtype=np.float64) if np.ndim(weight) else np.where(once, float(weight), 1.0))
    indexed = table.with_row_index("idx").with_columns(pl.col("idx").cast(pl.Int64), w=pl.Series(weights))
    names = [c for c in table.columns if c not in ("once", "rep")]
    kept, ordered = [], 0.0
    for name in names:
        sizes = indexed.group_by(name).agg(m=pl.len(), full=pl.col("w").sum())
        sizes = sizes.filter((pl.col("m") >= 2) & (pl.col("full") <= max_bucket))
        ordered += float((sizes["m"].cast(pl.Float64) * (sizes["m"] - 1)).sum())
        kept.append(sizes.select(name))
    if ordered == 0:
        return np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64), 1.0
    share = min(1.0, limit / ordered)
    # the first members looked at: drawn by a hash of the position, the same whatever the band
    indexed = indexed.with_columns(picked=pl.col("idx").hash(seed=7).cast(pl.Float64) / 2.0**64 < share)
    found = []
    for name, keys in zip(names, kept, strict=True):
        rows = indexed.select("idx", "picked", key=pl.col(name)).join(keys.rename({name: "key"}), on="key",
                                                                      how="semi")
        left = rows.filter("picked").select("idx", "key")
        pairs = left.join(rows.select("idx", "key"), on="key", suffix="_right").filter(
            pl.col("idx") != pl.col("idx_right"))
        found.append(pairs.select(pair=pl.col("idx") * n + pl.col("idx_right")))
    pairs = pl.concat(found)["pair"].unique().to_numpy()
    left, right = pairs // n, pairs % n
    reps = table["rep"].to_numpy()
    similar = exact_jaccard(sets.offsets, sets.elements, reps[left], reps[right]) >= threshold
    return left[similar], right[similar], share


def planner_visits(sets: ElementSets, sample: int = default_of("sample_size"), seed: int = 0) -> float:
    """Posting visits of the run's planner pairing ``sample`` entities with all of ``sets``
    (:func:`lshjob.plan.similarity.sample_histogram_from_sets`, before its cut at
    ``AGAINST_ALL_BUDGET``): the work of the plan stage beside reading the sets."""
    order = np.random.default_rng(seed).permutation(sets.size)[: min(sample, sets.size)]
    if sets.size <= len(order):
        return 0.0
    offsets, dense, n_ids = restricted_index(sets, sets.subset(order).elements)
    starts, _ = postings_of(offsets, dense, n_ids)
    return float(visit_costs(offsets, dense, starts)[order].sum())
