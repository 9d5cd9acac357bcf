"""Drift stage: per entity and period, how much of its set it had before (estimated from
signatures, with standard errors), and the rule that flags the changes the population and
the noise do not explain."""

from lshjob.drift.estimators import compare_with_history, ratio_and_error
from lshjob.drift.rule import DEFAULT_Z, MIN_POPULATION, RULE_TEXT, score_rows

__all__ = [
    "compare_with_history", "ratio_and_error", "DEFAULT_Z", "MIN_POPULATION", "RULE_TEXT",
    "score_rows",
]
