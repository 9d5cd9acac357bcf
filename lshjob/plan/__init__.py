"""Plan stage: choose signature length k, bands b and rows r for a Jaccard threshold.

:func:`choose_plan` (:mod:`lshjob.plan.choose`) is the one planning function of ``lshjob plan``
and ``lshjob run``; the S-curve and the search are in :mod:`lshjob.plan.banding`, the sample's
pair-similarity histogram in :mod:`lshjob.plan.similarity`.
"""

from lshjob.plan.banding import (
    PairHistogram,
    approximate_threshold,
    candidate_probability,
)
from lshjob.plan.choose import Plan, PlanMode, choose_plan

__all__ = [
    "PairHistogram", "Plan", "PlanMode", "approximate_threshold", "candidate_probability",
    "choose_plan",
]
