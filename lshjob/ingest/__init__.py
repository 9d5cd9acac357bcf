"""Ingest stage: event files checked and read, grouped into one set per entity."""

from lshjob._lazy import exports

__all__ = [
    "EventSource", "EventSpec", "GroupedEvents", "IngestReport", "load_sets", "open_events",
    "read_grouped", "resolve_paths", "validated_events",
]

__getattr__, __dir__ = exports(__name__, {
    "EventSpec": "spec",
    "IngestReport": "spec",
    "load_sets": "spec",
    "validated_events": "spec",
    "EventSource": "loading",
    "GroupedEvents": "loading",
    "open_events": "loading",
    "read_grouped": "loading",
    "resolve_paths": "files",
})
