"""Core: stable hashes, entity sets in compressed rows, atomic writes, the inputs' digest, the compile cache."""

from lshjob._lazy import exports

__all__ = [
    "ElementSets", "atomic_file", "element_codes", "file_sha256", "fmix64_expr", "input_digest",
    "slice_bounds", "splitmix64_sequence", "staged_folder", "xxh64_integers", "xxh64_strings",
]

__getattr__, __dir__ = exports(__name__, {
    "ElementSets": "sets",
    "element_codes": "sets",
    "xxh64_strings": "hashing",
    "xxh64_integers": "hashing",
    "fmix64_expr": "hashing",
    "splitmix64_sequence": "hashing",
    "atomic_file": "atomic",
    "staged_folder": "atomic",
    "file_sha256": "atomic",
    "input_digest": "digest",
    "slice_bounds": "slicing",
})
