"""What a sample holds under a plan, for the forecast scaled from it
(:class:`lshjob.plan.scaling.SampleProfile`): identical sets collapsed as the run collapses
them (:func:`lshjob.index.collapse.collapse_identical`), the representatives signed and cut
into bands as the run signs and bands them, and the sizes of the buckets they share."""

from __future__ import annotations

import numpy as np
import polars as pl

from lshjob.core.sets import ElementSets
from lshjob.core.slicing import slice_bounds
from lshjob.index.band.local import bucket_keys_by_position
from lshjob.index.collapse import collapse_identical
from lshjob.jobs.options import default_of
from lshjob.plan.scaling import SampleProfile
from lshjob.plan.similarity import postings_of, restricted_index, visit_costs
from lshjob.sign.signatures import SignatureParams, comparable_by_position

SLICE_REPS = 100_000  # representatives signed at a time (their positions: 8 x b x r bytes each)


def sample_profile(sets: ElementSets, perms: int, bands: int, rows: int, scheme: str | None = None,
                   seed: int | None = None) -> SampleProfile:
    """The profile of ``sets`` (a uniform sample of the entities) under the plan (k, b, r);
    ``scheme`` and ``seed`` the run's (default: the run's defaults)."""
    rep_of, reps = collapse_identical(sets)
    multiplicities = np.bincount(rep_of, minlength=sets.size)[reps]
    params = SignatureParams(scheme=scheme or default_of("scheme"), perms=perms,
                             seed=default_of("seed") if seed is None else seed)
    once = pl.Series("once", multiplicities[np.arange(len(reps))] == 1 if len(reps) else [], dtype=pl.UInt32)
    keys = []
    for lo, hi in slice_bounds(len(reps), SLICE_REPS):
        ids = reps[lo:hi]
        columns = comparable_by_position(sets, ids, params, bands * rows)
        keys.append(bucket_keys_by_position(columns, ids, bands, rows).drop("rep"))
        del columns
    table = pl.concat(keys).with_columns(once) if keys else pl.DataFrame()
    shapes = [table.group_by(name).agg(members=pl.len(), single=pl.col("once").sum())
              .filter(pl.col("members") >= 2).select(repeated=pl.col("members") - pl.col("single"), single="single")
              for name in table.columns if name != "once"]
    found = (pl.concat(shapes).group_by("repeated", "single").agg(buckets=pl.len()) if shapes else
             pl.DataFrame({"repeated": [], "single": [], "buckets": []}, schema={"repeated": pl.UInt32,
                                                                                 "single": pl.UInt32,
                                                                                 "buckets": pl.UInt32}))
    return SampleProfile(entities=int(sets.size), multiplicities=multiplicities,
                         bucket_repeated=found["repeated"].to_numpy().astype(np.int64),
                         bucket_single=found["single"].to_numpy().astype(np.int64),
                         bucket_counts=found["buckets"].to_numpy().astype(np.int64), bands=bands,
                         planner_visits=planner_visits(sets))


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
