"""The tables and files passed between stages, declared once and checked in tests."""

from lshjob.contracts.contract import ELEMENT, KEY, Contract, ContractError
from lshjob.contracts.manifest import Manifest, read_manifest
from lshjob.contracts.signature_file import SignatureMeta
from lshjob.contracts.tables import (
                                     ALL,
                                     BUCKET_ROWS,
                                     CANDIDATES,
                                     EVENTS,
                                     NEIGHBOURS,
                                     SET_ROWS,
                                     SIGNATURES,
                                     STAGES,
                                     VERIFIED,
)

__all__ = [
                                     "ALL",
                                     "BUCKET_ROWS",
                                     "CANDIDATES",
                                     "ELEMENT",
                                     "EVENTS",
                                     "KEY",
                                     "NEIGHBOURS",
                                     "SET_ROWS",
                                     "SIGNATURES",
                                     "STAGES",
                                     "VERIFIED",
                                     "Contract",
                                     "ContractError",
                                     "Manifest",
                                     "SignatureMeta",
                                     "read_manifest",
]
