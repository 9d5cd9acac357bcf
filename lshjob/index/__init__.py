"""Index stages: collapse identical sets, band, join, verify (engines chosen by name), publish."""

from lshjob._lazy import exports

__all__ = [
    "collapse_identical", "commit_index", "fingerprints", "get_engine", "identical_candidates",
    "names", "read_manifest", "register", "stage_neighbours",
]

__getattr__, __dir__ = exports(__name__, {
    "collapse_identical": "collapse",
    "fingerprints": "collapse",
    "identical_candidates": "collapse",
    "get_engine": "engines",
    "names": "engines",
    "register": "engines",
    "commit_index": "publish",
    "read_manifest": "publish",
    "stage_neighbours": "publish",
})
