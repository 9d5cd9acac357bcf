"""The flagging rule: an entity changed more than its set size, the estimate's noise and the
rest of the population that period explain.

Per period t, over the rows compared with a history (module :mod:`lshjob.drift.estimators`):

1. The population's typical containment c0 = the share of the period's elements found in
   their entity's history: sum(C n) / sum(n), n the set size capped at the positions m the
   estimate used (an estimate carries no more than m positions' worth). Uncapped, this is
   the maximum-likelihood estimate of a common c0 under the binomial model of step 2. The median
   of C is not: a set of one element is contained wholly or not at all, so where most sets
   are that small their median is 1 (or 0) whatever the share of elements found, and every
   larger set would then be measured against 1.
2. Each row's deficit against it, in units of the noise expected if the entity behaved like
   the population: d = (c0 - C) / sqrt(v (1 - v) (1/n + 1/m)), where n is the new period's
   set size, m the signature positions the containment was estimated from, and
   v = (c0 n + 1/2) / (n + 1) (c0 pulled half an element towards 1/2, so a population all at
   1 still has a non-zero spread). v (1 - v) / n is the binomial spread of the share of n
   elements found in the history when each is with probability c0 (a 5-element period moves
   in steps of 0.2); v (1 - v) / m the estimator's (binomial, as in the estimators' module).
3. ``score`` = (d - median d) / max(1, 1.4826 MAD d), medians and MAD over the period's rows
   (1.4826 MAD estimates a normal standard deviation; the spread is never taken below the
   binomial one, 1). ``flagged`` = score > z (default 3.5).

So a season that lowers everyone's containment lowers c0 and flags no one by itself; a small
set needs a larger drop than a large one; and the spread of entities around the median (what
the binomial model does not explain) is measured from the period itself. A period with fewer
than :data:`MIN_POPULATION` rows compared is not scored (its median would not say what the
population does).
"""

from __future__ import annotations

import polars as pl

DEFAULT_Z = 3.5
MIN_POPULATION = 20
MAD_TO_SD = 1.4826  # 1 / Phi^-1(3/4): MAD of a normal sample -> its standard deviation

RULE_TEXT = (
    "An entity-period is flagged when its containment in its own history is lower than the "
    "period's typical containment by more than Z (default 3.5) robust standard deviations, after scaling "
    "each entity's drop by the binomial noise of its set size and of the estimate: "
    "d = (c0 - C) / sqrt(v(1-v)(1/n + 1/m)), score = (d - median d) / max(1, 1.4826 MAD d) "
    "per period (n: set size, m: signature positions "
    "used, v: c0 pulled half an element towards 1/2; c0: the share of the period's elements found in "
    "their histories, sum(C n) / sum(n)). A season that changes everyone moves "
    "c0, not the score."
)


def score_rows(rows: pl.DataFrame, z: float = DEFAULT_Z) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Add ``score`` and ``flagged`` to ``rows`` (columns ``period``, ``set_size``,
    ``containment``, ``containment_positions``; containment null where nothing was compared);
    return them and the per-period population figures (``period``, ``compared``,
    ``median_containment``, ``median_similarity``, ``typical_containment`` (c0), ``flagged``,
    ``scored``)."""
    compared = pl.col("containment").is_not_null()
    n = pl.col("set_size").cast(pl.Float64).clip(lower_bound=1.0)
    m = pl.col("containment_positions").cast(pl.Float64).clip(lower_bound=1.0)
    frame = rows.with_columns(__c0=typical_containment(compared), __pop=compared.sum().over("period"))
    c0 = pl.col("__c0")
    v = (c0 * n + 0.5) / (n + 1.0)
    frame = frame.with_columns(__d=(c0 - pl.col("containment")) / (v * (1.0 - v) * (1.0 / n + 1.0 / m)).sqrt())
    med = pl.col("__d").median().over("period")
    frame = frame.with_columns(__dm=med)
    mad = (pl.col("__d") - pl.col("__dm")).abs().median().over("period")
    frame = frame.with_columns(__sd=pl.max_horizontal(pl.lit(1.0), MAD_TO_SD * mad))
    score = (pl.when(compared & (pl.col("__pop") >= MIN_POPULATION))
             .then((pl.col("__d") - pl.col("__dm")) / pl.col("__sd")))
    frame = frame.with_columns(score=score).with_columns(flagged=(pl.col("score") > z).fill_null(False))
    periods = (frame.group_by("period").agg(
        compared=compared.sum(),
        scored=pl.col("score").is_not_null().sum(),
        flagged=pl.col("flagged").sum(),
        median_containment=pl.col("containment").median(),
        median_similarity=pl.col("similarity").median(),
        typical_containment=pl.col("__c0").first(),
    ).sort("period"))
    return frame.drop("__c0", "__pop", "__d", "__dm", "__sd"), periods


def typical_containment(compared: pl.Expr) -> pl.Expr:
    """Per period, sum(C w) / sum(w) over the rows compared, w the set size capped at the
    containment's signature positions (step 1 of the module docstring)."""
    w = pl.when(compared).then(pl.min_horizontal(pl.col("set_size").cast(pl.Float64),
                                                 pl.col("containment_positions").cast(pl.Float64)).clip(lower_bound=1.0))
    return (pl.col("containment") * w).sum().over("period") / w.sum().over("period")
