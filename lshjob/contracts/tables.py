"""The tables passed between stages, declared once (:class:`lshjob.contracts.contract.Contract`).

Entity ids: the entities' keys sorted ascending; an entity's id is its position (0 to
entities - 1), and the id of a group of identical sets' representative is the smallest id of
the group. Every ``rep``, ``left_rep`` and ``right_rep`` is such an id.

``bands_shared``: the number of bands in which the two signatures fall in the same bucket,
from 1 to the plan's ``bands``. It is 0 exactly when the plan has no bands (mode
``identical-only``, threshold 1.0: only identical sets are paired, by their fingerprint), and
the members of a group of identical sets carry the plan's ``bands`` (they agree everywhere).
"""

from __future__ import annotations

import polars as pl

from lshjob.contracts.contract import ELEMENT, KEY, Contract

# The stages of ``lshjob run`` in the order they run (one part; in parts a ``count`` stage
# comes first and ingest, collapse, sign and band run for each key range in turn), with the
# tables each one hands on.
STAGES = (
    ("ingest", "EVENTS (grouped into the sets of each entity)"),
    ("collapse", "each entity's representative (groups of identical sets)"),
    ("plan", "the plan: perms, bands, rows (it chooses k, so it comes before signing)"),
    ("sign", "the representatives' signatures, a slice at a time, laid out by position "
             "(lshjob sign writes SIGNATURES)"),
    ("band", "BUCKET_ROWS"),
    ("join", "CANDIDATES"),
    ("verify", "VERIFIED"),
    ("publish", "NEIGHBOURS and the manifest"),
)

KEYS = pl.col("^(entity|segment|period)$")  # the key columns a table has
SET_KEYS = pl.col("^(entity|segment|period|element)$")
PERIOD_EVERY = {"day": "1d", "week": "1w", "month": "1mo"}


def _sorted_by(columns: pl.Expr) -> pl.Expr:
    """True on every row when the rows are sorted by ``columns`` (a stable sort moves none)."""
    return pl.int_range(pl.len()).sort_by(columns, maintain_order=True) == pl.int_range(pl.len())


def _non_decreasing(column: str) -> pl.Expr:
    return (pl.col(column) >= pl.col(column).shift(1)).fill_null(True)


def _entity_ids(*columns: str):
    def rule(entities: int) -> pl.Expr:
        return pl.all_horizontal([pl.col(c).is_between(0, entities - 1) for c in columns])
    return rule


def _representatives(*columns: str):
    def rule(representatives: pl.Series) -> pl.Expr:
        return pl.all_horizontal([pl.col(c).is_in(representatives.implode()) for c in columns])
    return rule


def _bands_shared(bands: int) -> pl.Expr:
    return pl.col("bands_shared").is_between(1, bands) if bands else pl.col("bands_shared") == 0


def _period_start(period_unit: str) -> pl.Expr:
    return pl.col("period") == pl.col("period").dt.truncate(PERIOD_EVERY[period_unit])


BANDS_SHARED = ("1 <= bands_shared <= bands; 0 exactly when the plan has no bands", _bands_shared)
PAIR_ORDER = ("left_rep < right_rep", pl.col("left_rep") < pl.col("right_rep"))
ONE_ROW_A_PAIR = ("one row per pair", pl.struct("left_rep", "right_rep").is_unique())
PAIR_IDS = ("0 <= left_rep, right_rep < entities (entity ids)", _entity_ids("left_rep", "right_rep"))
PAIR_REPS = ("left_rep and right_rep are representatives", _representatives("left_rep", "right_rep"))
PAIR = {"left_rep": pl.Int64, "right_rep": pl.Int64}

EVENTS = Contract(
    "EVENTS",
    schema={"entity": KEY, "segment": pl.String, "period": pl.Date, "element": ELEMENT, "weight": pl.Float64},
    optional=("segment", "period"),
    rules=[
        ("no null key or element", pl.all_horizontal(SET_KEYS.is_not_null())),
        ("weight is finite and >= 0", pl.col("weight").is_finite() & (pl.col("weight") >= 0)),
        ("period is the first day of its period_unit", _period_start),
    ],
    row="one event (weight 1, or its count)",
    producer="lshjob.ingest.spec.validated_events (lazy)",
    consumer="lshjob.ingest.spec.group_set_rows, lshjob.ingest.loading (event batches)",
)

SET_ROWS = Contract(
    "SET_ROWS",
    schema=dict(EVENTS.schema),
    optional=("segment", "period"),
    rules=[
        ("one row per (keys, element)", pl.struct(SET_KEYS).is_unique()),
        ("sorted by the key columns", _sorted_by(KEYS)),
        ("weight >= min_count", lambda min_count: pl.col("weight") >= min_count),
    ],
    row="one element of one set, with its summed weight",
    producer="lshjob.ingest.spec.group_set_rows (load_sets)",
    consumer="lshjob.sign.slices.sign_slices",
)

SIGNATURES = Contract(
    "SIGNATURES",
    schema={"entity": KEY, "segment": pl.String, "period": pl.Date, "signature": pl.List(pl.UInt64),
            "set_size": pl.UInt32},
    optional=("segment", "period"),
    rules=[
        ("one row per key", pl.struct(KEYS).is_unique()),
        ("sorted by the key columns", _sorted_by(KEYS)),
        ("signature holds k values", lambda k: pl.col("signature").list.len() == k),
        ("set_size >= 1", pl.col("set_size") >= 1),
    ],
    row="one signed set; the file's metadata: lshjob.contracts.signature_file",
    producer="lshjob.jobs.sign.sign_file, lshjob.sign.slices.sign_slices, merge_signatures",
    consumer="lshjob merge, estimate_jaccard, the user",
)

BUCKET_ROWS = Contract(
    "BUCKET_ROWS",
    schema={"band": pl.Int32, "bucket": pl.UInt64, "rep": pl.Int64},
    rules=[
        ("0 <= band < bands", lambda bands: pl.col("band").is_between(0, bands - 1)),
        ("a (band, bucket) holds >= 2 rows", pl.len().over("band", "bucket") >= 2),
        ("one row per (band, rep)", pl.struct("band", "rep").is_unique()),
        ("0 <= rep < entities (entity ids)", _entity_ids("rep")),
        ("rep is a representative", _representatives("rep")),
    ],
    row="a representative in a bucket it shares with another (files buckets-NNNNN.parquet)",
    producer="lshjob.index.band.local.write_shared_bucket_rows (the band engine)",
    consumer="lshjob.index.join.duckdb.candidate_pairs (sql/sized_bucket_rows.sql)",
)

CANDIDATES = Contract(
    "CANDIDATES",
    schema={**PAIR, "bands_shared": pl.Int32},
    rules=[PAIR_ORDER, BANDS_SHARED, PAIR_IDS, PAIR_REPS,
           ("a pair's rows sum bands_shared to at most bands",
            lambda bands: pl.col("bands_shared").sum().over("left_rep", "right_rep") <= max(bands, 1))],
    row=("a pair of representatives to verify, in no particular order; a pair met in several bands "
         "may take a row per band, its bands_shared the sum of its rows' (a file; in parts a folder "
         "left_part=i/right_part=j/*.parquet, i <= j)"),
    producer=("lshjob.index.join.duckdb.candidate_pairs (sql/candidates.sql, sql/candidate_rows.sql), "
              "lshjob.index.collapse.identical_candidates"),
    consumer="lshjob.index.verify.local.verify_blocks",
)

VERIFIED = Contract(
    "VERIFIED",
    schema={**PAIR, "jaccard": pl.Float64, "estimate": pl.Float64, "bands_shared": pl.Int32},
    rules=[
        PAIR_ORDER, ONE_ROW_A_PAIR,
        ("threshold <= jaccard <= 1", lambda threshold: pl.col("jaccard").is_between(threshold, 1.0)),
        ("0 <= estimate <= 1", pl.col("estimate").is_between(0.0, 1.0)),
        ("estimate = jaccard when the plan has no bands",
         lambda bands: pl.lit(True) if bands else pl.col("estimate") == pl.col("jaccard")),
        BANDS_SHARED, PAIR_IDS, PAIR_REPS,
    ],
    row=("a candidate whose exact Jaccard reached the threshold, with the signature estimate "
         "(fraction of equal positions); in no particular order; given the run's top-k, only the "
         "pairs that can enter one side's list"),
    producer="lshjob.index.verify.local.verify_blocks (the verify engine)",
    consumer="lshjob.index.publish.expand",
)


def _ranked() -> pl.Expr:
    """Within an entity, each row after the first has a lower Jaccard than the row before, or
    the same Jaccard and a larger neighbour key."""
    jaccard, neighbour = pl.col("jaccard").shift(1).over("entity"), pl.col("neighbour").shift(1).over("entity")
    return ((pl.col("jaccard") < jaccard) | ((pl.col("jaccard") == jaccard) & (pl.col("neighbour") > neighbour))
            ).fill_null(True)


NEIGHBOURS = Contract(
    "NEIGHBOURS",
    schema={"entity": KEY, "neighbour": KEY, "jaccard": pl.Float64, "estimate": pl.Float64,
            "bands_shared": pl.Int32, "rank": pl.UInt32},
    rules=[
        ("entity != neighbour", pl.col("entity") != pl.col("neighbour")),
        ("one row per (entity, neighbour)", pl.struct("entity", "neighbour").is_unique()),
        ("sorted by entity", _non_decreasing("entity")),
        ("rank is 1, 2, ... within an entity", pl.col("rank") == pl.int_range(1, pl.len() + 1).over("entity")),
        ("rank <= top_k", lambda top_k: pl.col("rank") <= top_k),
        ("jaccard non-increasing with rank, ties by neighbour ascending", _ranked()),
        ("threshold <= jaccard <= 1", lambda threshold: pl.col("jaccard").is_between(threshold, 1.0)),
        ("0 <= estimate <= 1", pl.col("estimate").is_between(0.0, 1.0)),
        BANDS_SHARED,
    ],
    row=("an entity and one of its top_k most similar others (neighbours.parquet); both directions "
         "unless the neighbour's own list is full"),
    producer="lshjob.index.publish.neighbour_blocks, stage_neighbours",
    consumer="the user, lshjob audit",
)

ALL = (EVENTS, SET_ROWS, SIGNATURES, BUCKET_ROWS, CANDIDATES, VERIFIED, NEIGHBOURS)
