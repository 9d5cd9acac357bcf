"""Sign stage: MinHash signatures (kperm, oph) of each entity's set, one fold per scheme, one slice path."""

from lshjob._lazy import exports

__all__ = [
    "SetRows", "SignatureParams", "estimate_jaccard", "merge_signatures", "read_signatures",
    "sign_sets", "sign_slices", "write_signatures", "write_streamed",
]

__getattr__, __dir__ = exports(__name__, {
    "SignatureParams": "params",
    "read_signatures": "signatures",
    "write_signatures": "signatures",
    "merge_signatures": "signatures",
    "estimate_jaccard": "signatures",
    "sign_slices": "slices",
    "sign_sets": "slices",
    "SetRows": "slices",
    "write_streamed": "streaming",
})
