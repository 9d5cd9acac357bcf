"""lshjob: a neighbour index over very large collections of sets (MinHash + LSH)."""

__version__ = "0.1.0"

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
