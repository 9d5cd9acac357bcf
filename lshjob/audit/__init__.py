"""Audit: a published index checked against brute force on a sample of entities."""

from lshjob._lazy import exports

__all__ = [
    "audit_index", "top_k_recall",
]

__getattr__, __dir__ = exports(__name__, {
    "audit_index": "check",
    "top_k_recall": "check",
})
