"""lshjob: a neighbour index over very large collections of sets (MinHash + LSH)."""

import os

from lshjob._version import __version__  # noqa: F401  (re-exported: lshjob.__version__)
from lshjob.core.compile_cache import configure_cache_dir

# LSHJOB_CACHE_DIR becomes numba's cache folder before numba is imported (lshjob.core.compile_cache).
configure_cache_dir()

# polars' allocator (jemalloc) keeps freed pages resident by default ("muzzy_decay_ms:-1"),
# so a run's resident memory only grows; a job held to a memory budget returns them at
# once. Polars reads this variable when it is first imported, after its own settings, so
# this takes effect when lshjob is imported first (as by the lshjob command); a value the
# user set is kept.
os.environ.setdefault("_RJEM_MALLOC_CONF", "muzzy_decay_ms:0")

# The public names load on first use (PEP 562), so that the ``lshjob`` command can take over
# the stop signals (lshjob.cli.console) before polars, numba and DuckDB are imported.
_PUBLIC = {
    "merge_files": "jobs.merge", "sign_file": "jobs.sign", "plan_banding": "jobs.plan",
    "RunOptions": "jobs.run", "run_job": "jobs.run", "audit_index": "audit.check",
    "IncompatibleSignatures": "errors", "InputError": "errors", "LshjobError": "errors",
    "ParameterError": "errors",
    "EventSpec": "ingest.spec", "load_sets": "ingest.spec",
    "SignatureParams": "sign.params", "estimate_jaccard": "sign.signatures",
    "merge_signatures": "sign.signatures", "read_signatures": "sign.signatures",
    "sign_sets": "sign.slices", "write_signatures": "sign.signatures",
}


def __getattr__(name: str):
    if name not in _PUBLIC:
        raise AttributeError(f"module 'lshjob' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(f".{_PUBLIC[name]}", __name__), name)
    globals()[name] = value
    return value


__all__ = [
    "RunOptions", "audit_index", "plan_banding", "run_job",
    "EventSpec", "IncompatibleSignatures", "InputError", "LshjobError", "ParameterError",
    "SignatureParams", "estimate_jaccard", "load_sets", "merge_files", "merge_signatures",
    "read_signatures", "sign_file", "sign_sets", "write_signatures",
]
