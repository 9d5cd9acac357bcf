"""What defines a signature: the scheme, k and the seed (no compiled code here, so the Python
API and option checks can name them without loading numba)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lshjob.errors import ParameterError

SCHEMES = ("kperm", "oph")


@dataclass(frozen=True)
class SignatureParams:
    """What defines a signature: two files may be merged or compared only if these agree."""

    scheme: str = "kperm"
    perms: int = 128
    seed: int = 1

    def __post_init__(self) -> None:
        if self.scheme not in SCHEMES:
            raise ParameterError(f"--scheme must be one of {', '.join(SCHEMES)}; got {self.scheme!r}")
        if not 1 <= self.perms <= 4096:
            raise ParameterError(f"--perms must be in [1, 4096]; got {self.perms}")
        if not 0 <= self.seed < 2**64:
            raise ParameterError(f"--seed must be in [0, 2**64); got {self.seed}")

    def salts(self) -> np.ndarray:
        """The k 64-bit salts of the hash family (SplitMix64 of the seed)."""
        from lshjob.core.hashing import splitmix64_sequence  # numba's kernels load with the first signature

        return splitmix64_sequence(self.seed, self.perms)
