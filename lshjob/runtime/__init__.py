"""Run-time concerns: the memory budget, key ranges, the output lock, work folders, progress, stop signals."""

from lshjob._lazy import exports

__all__ = [
    "Budget", "EntitySelection", "HeldSets", "PartStore", "StageProgress", "default_memory",
    "key_ranges", "output_lock", "parse_size", "peak_bytes",
]

__getattr__, __dir__ = exports(__name__, {
    "Budget": "budget",
    "parse_size": "budget",
    "default_memory": "budget",
    "peak_bytes": "budget",
    "EntitySelection": "partitions",
    "key_ranges": "partitions",
    "HeldSets": "partitions",
    "PartStore": "partitions",
    "output_lock": "folder_lock",
    "StageProgress": "progress",
})
