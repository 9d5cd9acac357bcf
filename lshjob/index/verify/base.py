"""The verify stage's seam: what every verify engine takes and gives.

Input: CANDIDATES (:mod:`lshjob.index.join.base`: a Parquet file, or a folder split by the
parts of the two sides, ``left_part=i/right_part=j/*.parquet``; a pair may take a row per band
it met in; with them, maybe a CROWDS file whose members' pairs are candidates too), the element sets (a
:class:`SetStore`: part i holds entity ids ``ranges[i][0]..ranges[i][1]``) and a threshold.

Output, VERIFIED (a table): ``left_rep`` < ``right_rep`` (Int64), ``jaccard`` Float64 (exact:
intersection / union of the sets' integer counts, never from signatures), ``estimate``
Float64 (the fraction of equal positions of the two comparable signatures; equal to
``jaccard`` when no signatures are made, identical sets only), ``bands_shared`` Int32; the
candidates with ``jaccard >= threshold``, each once, in no particular order. Given
``VerifySettings.top_k`` and ``group_sizes``, an engine may leave out the pairs that can enter
neither side's list (they are never published).

:mod:`lshjob.index.conformance` checks an engine against this definition.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Protocol, runtime_checkable

import polars as pl

from lshjob.contracts.tables import VERIFIED
from lshjob.core.sets import ElementSets
from lshjob.sign.signatures import SignatureParams

VERIFIED_SCHEMA = dict(VERIFIED.schema)  # declared once, in lshjob.contracts.tables


class SetStore(Protocol):
    """The sets of a run by consecutive ranges of entity ids (held, or saved per part)."""

    ranges: list[tuple[int, int]]

    def load(self, i: int) -> ElementSets:
        """The sets of range i: set t is entity ``ranges[i][0] + t``."""
        ...


@dataclass(frozen=True)
class VerifySettings:
    slice_rows: int = 1 << 20  # candidates read and verified at a time
    estimate_bytes: int | None = None  # signatures made at a time for the estimates (None: all)
    held_rows: int | None = None  # verified rows held before they are deduplicated (None: a block's all)
    # With both: keep only the pairs that can enter the top_k list of one of their sides
    # (group_sizes: the members of each representative's group of identical sets, by entity
    # id), before the estimates; the lists published are the same (lshjob.index._ranking.pairs_in_lists).
    # An engine may ignore them and keep every pair.
    top_k: int | None = None
    group_sizes: Any = None
    # counts an engine may fill: "over_threshold", the pairs that reached the threshold before that cut
    tally: dict | None = None
    # True: no two entities of one range hold the same set (representatives, lshjob.index.collapse),
    # so two sets of one size share all their elements but one at most; an engine may skip the
    # pairs of one size that bound puts below the threshold (or below the floors of the lists)
    distinct_sets: bool = False


@runtime_checkable
class VerifyEngine(Protocol):
    name: ClassVar[str]

    def verify(self, candidates: Path, sets: SetStore, threshold: float, params: SignatureParams | None,
               settings: VerifySettings, crowds: Path | None = None) -> pl.DataFrame:
        """CANDIDATES -> VERIFIED. ``params``: how the signatures were made (for ``estimate``),
        None when there are none (the estimate is then the exact value). ``crowds``: the
        join's CROWDS (:mod:`lshjob.index.join.base`), whose members' pairs are candidates too.
        The local engine also takes ``reserve=``, the join's RESERVE, which the run gives it
        alone (:func:`lshjob.jobs.crowd_caps.reserve_cap`); another engine need not."""
        ...


def empty_verified() -> pl.DataFrame:
    """VERIFIED with no row."""
    return pl.DataFrame(schema=VERIFIED_SCHEMA)
