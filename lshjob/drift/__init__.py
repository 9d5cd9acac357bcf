"""Drift stage: per entity and period, how much of its set it had before (estimated from
signatures, with standard errors), the rule that flags the changes the population and the
noise do not explain, and the flagged rows checked against the refresh store's exact sets."""

from lshjob.drift.estimators import compare_with_history, ratio_and_error
from lshjob.drift.rule import DEFAULT_Z, MIN_POPULATION, RULE_TEXT, score_rows

__all__ = [
    "compare_with_history", "ratio_and_error", "DEFAULT_Z", "MIN_POPULATION", "RULE_TEXT",
    "score_rows",
]
# lshjob.drift.exact (the check against the store) is imported where it is used: it loads DuckDB.
