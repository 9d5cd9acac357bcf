"""lshjob: a neighbour index over very large collections of sets (MinHash + LSH)."""

import os

from .compile_cache import configure_cache_dir, install_notice

__version__ = "0.1.0"

# LSHJOB_CACHE_DIR becomes numba's cache folder before numba is imported (lshjob.compile_cache).
configure_cache_dir()

# polars' allocator (jemalloc) keeps freed pages resident by default ("muzzy_decay_ms:-1"),
# so a run's resident memory only grows; a job held to a memory budget returns them at
# once. Polars reads this variable when it is first imported, after its own settings, so
# this takes effect when lshjob is imported first (as by the lshjob command); a value the
# user set is kept.
os.environ.setdefault("_RJEM_MALLOC_CONF", "muzzy_decay_ms:0")

install_notice()  # one line on stderr when a kernel compiles (no cached code for this machine)

from .api import merge_files, sign_file  # noqa: E402
from .errors import IncompatibleSignatures, InputError, LshjobError, ParameterError  # noqa: E402
from .ingest import EventSpec, load_sets  # noqa: E402
from .signatures import (  # noqa: E402
    SignatureParams,
    estimate_jaccard,
    merge_signatures,
    read_signatures,
    sign_sets,
    write_signatures,
)

__all__ = [
    "EventSpec", "IncompatibleSignatures", "InputError", "LshjobError", "ParameterError",
    "SignatureParams", "estimate_jaccard", "load_sets", "merge_files", "merge_signatures",
    "read_signatures", "sign_file", "sign_sets", "write_signatures",
]
