"""Verify stage: candidate pairs -> exact Jaccard from the sets (the seam in ``base``)."""

from lshjob.index.verify._jaccard import exact_jaccard, jaccard_at_least, jaccard_between
from lshjob.index.verify.base import VERIFIED_SCHEMA, SetStore, VerifyEngine, VerifySettings, empty_verified
from lshjob.index.verify.local import LocalVerify, verify_between

__all__ = ["VERIFIED_SCHEMA", "LocalVerify", "SetStore", "VerifyEngine", "VerifySettings", "empty_verified",
           "exact_jaccard", "jaccard_at_least", "jaccard_between", "verify_between"]
