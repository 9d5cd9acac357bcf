"""The library-network demo: invented patrons, titles, branches and months."""

from lshjob._lazy import exports

__all__ = [
    "generate_events", "write_demo",
]

__getattr__, __dir__ = exports(__name__, {
    "generate_events": "generate",
    "write_demo": "generate",
})
