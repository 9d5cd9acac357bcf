"""The join stage's seam: what every join engine takes and gives (Parquet files).

Input: BUCKET_ROWS files (:mod:`lshjob.index.band.base`; rows of shared buckets only) and
the number of all bucket rows. Buckets holding more than ``max_bucket`` representatives are
split by each member's bucket in the next band ((j + 1) mod b); sub-buckets still over the
cap are left out and counted. An engine that lists crowds (below) takes ``max_crowd`` as the
cap instead, when it writes a row per band and ``crowd_size`` <= ``max_bucket`` (every bucket
over ``max_bucket`` is then a crowd); the skew report's ``max_bucket`` is the cap it took.

Output, CANDIDATES: Parquet with ``left_rep`` < ``right_rep`` (Int64 entity ids of
representatives), ``bands_shared`` Int32 >= 1 (the buckets within the cap, or sub-buckets of
oversize ones, the pair met in), in no particular order: one row per unordered pair, or, when
the engine leaves deduplication to verification, a row per band the pair met in (a pair's
``bands_shared`` is then the sum of its rows'; verification sums them). Such an engine may
also leave the pairs of large buckets unwritten and list their members instead, CROWDS
(``JoinOutput.crowds``, a Parquet file: ``crowd`` Int64, ``rep`` Int64, one row per (crowd,
rep), sorted by crowd then rep; and, when the engine gives it, ``band`` Int32, the crowd's
band, a rep in one crowd a band at most): every pair of a crowd's members is a candidate row
with ``bands_shared`` 1, made by verification (:mod:`lshjob.index.verify.local`; given the
bands, a pair met in several crowds is verified once, with their number). Given
the entity id ranges of a run's parts (consecutive, :mod:`lshjob.jobs.parts`), a folder
instead: the same rows split by the parts of their two sides,
``left_part=i/right_part=j/*.parquet`` (``i <= j``). With the pairs, the skew report: the
columns of ``sql/bucket_skew.sql`` and ``max_bucket``.

Asked for it (``JoinSettings.reserve_cap``, one file of candidates only), an engine may also
hold the buckets it left over the cap in reserve, RESERVE (``JoinOutput.reserve``, a Parquet
file: ``crowd``, ``rep`` and ``band`` as CROWDS, and ``skipped`` Int64, the bucket's pairs no
sub-bucket within the cap holds), buckets of up to ``reserve_cap`` members: local
verification compares a reserve bucket whole when a sample of its members shows lists it
would fill (:mod:`lshjob.index.verify._reserve`). They are not candidates: the skew report
counts their pairs as skipped.

:mod:`lshjob.index.conformance` checks an engine against this definition.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar, Protocol, runtime_checkable

from lshjob.contracts.tables import CANDIDATES

DEFAULT_MAX_BUCKET = 2000
DEFAULT_MAX_CROWD = DEFAULT_MAX_BUCKET  # 50,000 pays on long-tailed data with --recall-of lists up to 3M
# entities, but at 10M verification's held rows passed 22 GB (docs/performance.md)

CANDIDATES_SCHEMA = dict(CANDIDATES.schema)  # declared once, in lshjob.contracts.tables

SKEW_COLUMNS = ("buckets", "buckets_with_pairs", "oversize_buckets", "oversize_rows", "oversize_pairs",
                "split_pairs", "skipped_pairs", "oversize_sub_buckets", "bucket_pairs", "largest_bucket")


@dataclass(frozen=True)
class JoinSettings:
    memory_limit: str = "4GB"  # what the engine may hold (it spills beyond)
    temp_directory: str | None = None  # where it spills
    threads: int | None = None
    max_bucket: int = DEFAULT_MAX_BUCKET
    # Over this many pair rows (pairs counted once per band), an engine may write a row per
    # band instead of one per pair when pairs repeat at most ``max_repeat`` times on average:
    # verifying a repeat costs less than deduplicating tens of millions of pairs. (At 1.5, Zipf
    # 2.0 data with pairs repeating 1.65 times went to the GROUP BY: 113 s against 2 s for the
    # join, the same index; bench/RESULTS.md, "Other long-tailed shapes".)
    dedupe_up_to: int = 4_000_000
    max_repeat: float = 4.0
    # Then buckets of this many members or more are crowds (module docstring): their pairs,
    # most of them on long-tailed data, are made by verification, a bucket's sets at a time.
    crowd_size: int = 64
    # And crowds may hold up to this many members (at least ``max_bucket``; ``crowd_size`` at
    # most ``max_bucket``): a larger bucket is split by the next band and, still over, left out.
    # Verification pairs a crowd by prefix filtering, so a crowd of many tiny sets of popular
    # elements costs about its members, not its pairs; capped at ``max_bucket``, the buckets
    # every tiny set of a popular element lands in were left out, and with them its list
    # (docs/performance.md, "plans on the lists' recall, crowds up to 50,000 members").
    max_crowd: int = DEFAULT_MAX_CROWD
    # Buckets over the cap, up to this many members, are listed in reserve (module docstring);
    # 0: none is.
    reserve_cap: int = 0

    def crowd_cap(self) -> int:
        """The cap on a bucket's members when large buckets go to verification as crowds: the
        crowd cap when every bucket over ``max_bucket`` is a crowd (``crowd_size`` <= ``max_bucket``)."""
        if self.crowd_size <= self.max_bucket:
            return max(self.max_bucket, self.max_crowd)
        return self.max_bucket


@dataclass(frozen=True)
class JoinOutput:
    candidates: Path  # CANDIDATES file, or folder split by ranges
    pairs: int  # rows written, and the pairs of crowds (a pair written a row per band counts once per band)
    skew: dict  # SKEW_COLUMNS and max_bucket, integers
    crowds: Path | None = None  # CROWDS (module docstring), when the engine left large buckets unpaired
    rows_per_band: bool = False  # the join was large enough to write a row per band, crowds apart
    reserve: Path | None = None  # RESERVE (module docstring), when asked for and a bucket was over the cap


@runtime_checkable
class JoinEngine(Protocol):
    name: ClassVar[str]

    def candidates(self, bucket_files: Sequence[Path], bands: int, out: Path, settings: JoinSettings,
                   bucket_rows: int | None = None, ranges: Sequence[tuple[int, int]] | None = None) -> JoinOutput:
        """BUCKET_ROWS files -> CANDIDATES at ``out`` (a file; a folder when ``ranges`` are given),
        written under a temporary name and renamed. ``bucket_rows``: all bucket rows, buckets
        of one included (default: the rows in the files)."""
        ...
