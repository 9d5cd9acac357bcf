"""The memory budget: sizes, the machine's memory, per-stage peak resident memory (Linux),
and every memory figure and rule of the jobs.

Whether a job's sets fit in one part is decided in one place, :meth:`Budget.one_part`: each
command computes what it needs with a cost function of this module (:func:`grouping_bytes`
for ``lshjob run`` and ``lshjob audit``, :func:`signing_need` and :func:`keyed_need` for
``lshjob sign``, :func:`merge_need` for ``lshjob merge``) and asks it; a job in parts then
sizes its key ranges with :meth:`Budget.range_bytes` (:mod:`lshjob.runtime.partitions`).
The figures are module attributes read when a rule is applied, so changing one here (as
tests do) changes every decision that uses it.
"""

from __future__ import annotations

import ctypes
import os
import re
import resource
from dataclasses import dataclass

from lshjob.core import slicing  # SLICE_ROWS: rows of a signature slice, read when used
from lshjob.errors import ParameterError

_UNITS = {"": 1, "B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40,
          "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}  # a bare letter is binary, as in 8g (common practice)


MIN_BUDGET = 512 * 2**20  # at 100k entities a run peaks at 0.39 GiB whatever its budget (measured)


def parse_size(text: str) -> int:
    """'8GB' -> 8e9 bytes; '512MiB' and '512M' -> 512 * 2**20; '1.5GB'; plain bytes. Any case.

    A budget below 512MiB or above the machine's memory is refused: the first could not be
    kept, the second would let the job grow until the system swaps or kills it."""
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([A-Za-z]*)\s*", str(text))
    if not match or match.group(2).upper() not in _UNITS:
        raise ParameterError(f"--memory must be a size like 8GB, 8GiB, 8G or 512MiB; got {text!r}")
    value = float(match.group(1)) * _UNITS[match.group(2).upper()]
    if value < MIN_BUDGET:
        raise ParameterError(
            f"--memory must be at least 512MiB; got {text!r}: the process itself, with polars, numba "
            "and DuckDB loaded, takes about 200 MiB, so a smaller budget could not be kept"
        )
    machine = physical_memory()
    if value > machine:
        raise ParameterError(f"--memory {str(text).strip()} is more than this machine's {machine / 2**30:.1f} GiB")
    return int(value)


def physical_memory() -> int:
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")


def default_memory() -> int:
    """Half the machine's memory (common practice for a job sharing its host)."""
    return physical_memory() // 2


def reset_peak() -> bool:
    """Reset the kernel's resident-memory high-water mark (Linux clear_refs '5'), so each stage
    records its own peak. The reset also clears what ``getrusage`` reports of the process once
    it has ended; with ``LSHJOB_PEAK_PER_STAGE=0`` in the environment nothing is reset, so that
    figure is the whole process's peak (the memory tests measure runs so) and each stage
    records the peak so far."""
    if os.environ.get("LSHJOB_PEAK_PER_STAGE") == "0":
        return False
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _status_bytes(field: str) -> int | None:
    """A memory line of /proc/self/status (in kB there) as bytes; None where unavailable."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def peak_bytes() -> int:
    """Peak resident memory since the last reset (VmHWM), else the process's lifetime peak."""
    peak = _status_bytes("VmHWM")
    return peak if peak is not None else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def release_freed() -> None:
    """Hand memory freed in the process back to the system (glibc's ``malloc_trim``), so
    what is resident is what is held; nothing where that call is unavailable."""
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):
        pass


def current_bytes() -> int:
    """Resident memory now (VmRSS), 0 where /proc is unavailable."""
    return _status_bytes("VmRSS") or 0


# --- what grouping events into sets costs (lshjob.ingest.loading, module docstring) ---
BYTES_PER_EVENT = {False: 20, True: 36}  # id + code + grouped code (+ weights, twice)
BYTES_PER_EVENT_IN_RANGE = {False: 8, True: 16}  # grouped code (+ weight): keys in a small range
BYTES_PER_KEY_VALUE = 8  # slot pointer per value of the key range
DENSE_MIN_SPAN = 1 << 16  # a table this small (512 KiB) is always worth it

# --- shares of the budget ---
ONE_PART_SHARE = 0.5  # grouping all events may take this share of the budget, else parts
PART_SHARE = 0.5  # what grouping one part of a run may take, of what the run does not hold across parts
SIGN_PART_SHARE = 0.75  # the same for lshjob sign, which holds nothing else (10M at 4GB: peak 2.3 GB at 0.5)
MERGE_PART_SHARE = 0.75  # the same for lshjob merge
AUDIT_PART_SHARE = 0.25  # lshjob audit: the part and a copy of it with the sample appended, a quarter each
RANGE_FLOOR = 10  # a part never takes under a tenth of the budget (smaller ones cost more passes than they save)
SLICE_SHARE = 8  # a slice of signatures, a batch of the band search, a slice of candidates: an eighth each
ESTIMATE_SHARE = 16  # the verified pairs' signatures (for their estimate) take a 16th of the budget at a time

# --- what a job holds ---
PROCESS_BYTES = 256 << 20  # the interpreter with polars, numba and DuckDB loaded: about 200 MiB measured
HELD_BYTES_PER_ENTITY = 32  # held across parts: representative, event count and key (about 8 bytes of a key)
COPY_BYTES = 512 << 20  # streaming ranges' signatures into one file, beside the ranges: merge under
# 700MB peaked at 1.02 GiB, sign at 0.79 GiB (1M entities, measured), so budgets under 1GiB are refused
COPY_MARGIN = 256 << 20  # beside the process and the copy: the range itself
SIGNATURE_BYTES_PER_ENTITY = 40  # beside the 8k signature bytes: set size, key, list offsets
# polars' group-by over (entity, segment, period, element), then the signing of its rows: 229
# bytes an event at the peak (10M events, text segments, monthly periods; measured)
KEYED_BYTES_PER_EVENT = 256
MERGE_COPIES = 4  # rows read (with decode buffers), the merged matrix and its column, writing: 3.1x measured
# in one part with every key distinct (2M rows, 6.3 GiB), 2.7x with every key twice; under --memory 1GiB
# the peaks were 1.10 and 0.99 GiB
SLICES_IN_FLIGHT = 4  # slices the streaming writer may hold at once
BYTES_PER_SIGNATURE_VALUE = 8  # one uint64 a permutation
VERIFY_BYTES_PER_PAIR = 64  # candidate row in polars and numpy, plus the float results
# a verified row verification holds when it deduplicates its rows (lshjob.index.verify.local.HeldRows),
# with what it makes of it then (its copy in one buffer, its key, the rows kept): 93 bytes in the
# resident-memory probe of tests/test_scaling.py (2M rows), so 12 words; the rows held then take at
# most half the budget
VERIFY_HELD_ROW_BYTES = 96
VERIFY_HELD_SHARE = 2
MIN_VERIFY_SLICE = 1_000_000
MIN_SIGN_SLICE = 10_000  # representatives signed at a time in a run, at the least
MIN_BAND_BATCH = 64 << 20  # bytes of a batch of the band search, at the least
BUCKET_KEY_BYTES = 8  # a band's bucket key of a representative


def dense_span(entity_range: tuple[int, int] | None, events: int) -> int:
    """Size of the table over the integer key range when the loader's two-pass way applies
    (keys in a range at most a quarter of the events, or under ``DENSE_MIN_SPAN``), else 0."""
    if entity_range is None:
        return 0
    span = entity_range[1] - entity_range[0] + 1
    return span if span <= max(events // 4, DENSE_MIN_SPAN) and span < 2**32 else 0


def grouping_bytes(events: int, weighted: bool, span: int = 0) -> int:
    """Memory the loader needs at its peak for this many events; ``span`` is the size of the
    integer key range when the two-pass way applies (:func:`dense_span`), else 0."""
    if span:
        return events * BYTES_PER_EVENT_IN_RANGE[weighted] + span * BYTES_PER_KEY_VALUE
    return events * BYTES_PER_EVENT[weighted]


def bytes_per_event(events: int, weighted: bool, entity_range: tuple[int, int] | None) -> float:
    """Grouping cost of an event: 8 bytes (16 weighted) when the integer keys lie in a small
    range, plus the range's table spread over the events; else 20 (36)."""
    span = dense_span(entity_range, events)
    if span:
        return BYTES_PER_EVENT_IN_RANGE[weighted] + BYTES_PER_KEY_VALUE * span / max(events, 1)
    return BYTES_PER_EVENT[weighted]


def signing_need(grouping: int, entities: int) -> int:
    """``lshjob sign``, one set per entity: the grouped events and, as the signatures go to the
    writer a slice at a time, about 40 bytes an entity (its key, set size and list offsets)."""
    return grouping + entities * SIGNATURE_BYTES_PER_ENTITY


def keyed_need(events: int) -> int:
    """``lshjob sign`` with segments or periods of text entity keys: polars' group-by."""
    return events * KEYED_BYTES_PER_EVENT


def merge_row_bytes(perms: int) -> int:
    """``lshjob merge``: what a signature row costs, held ``MERGE_COPIES`` times."""
    return MERGE_COPIES * (BYTES_PER_SIGNATURE_VALUE * perms + SIGNATURE_BYTES_PER_ENTITY)


def merge_need(rows: int, perms: int) -> int:
    return rows * merge_row_bytes(perms)


def writer_reserve(perms: int) -> int:
    """The signature slices in flight to a streaming writer (kept out of what grouping may take)."""
    return SLICES_IN_FLIGHT * slicing.SLICE_ROWS * BYTES_PER_SIGNATURE_VALUE * perms


def held_bytes(entities: int) -> int:
    """What a run in parts holds across parts (entity keys, representatives, event counts),
    the process included."""
    return PROCESS_BYTES + entities * HELD_BYTES_PER_ENTITY


@dataclass(frozen=True)
class Budget:
    """A job's memory budget (bytes, from :func:`parse_size` or :func:`default_memory`) and
    its ``--parts`` (None: as the budget needs)."""

    memory: int
    parts: int | None = None

    def one_part(self, need: float, reserve: int = 0) -> bool:
        """THE decision: ``--parts 1`` -> one part; ``--parts N`` > 1 -> parts; else one part
        when ``need`` bytes are within ``ONE_PART_SHARE`` of what ``reserve`` leaves."""
        if self.parts is not None:
            return self.parts == 1
        return need <= ONE_PART_SHARE * (self.memory - reserve)

    def range_bytes(self, entities: int, share: float | None = None, reserve: int = 0) -> int:
        """Bytes one key range may take: ``share`` (default ``PART_SHARE``) of what ``reserve``
        and what is held across parts leave (the rest is for signing a slice, polars' batches
        and the saved part's copy), never under a tenth of what ``reserve`` leaves."""
        usable = self.memory - reserve
        return int(max((share or PART_SHARE) * (usable - held_bytes(entities)), usable // RANGE_FLOOR))

    def run_range_bytes(self, entities: int, held: int) -> int:
        """A run's key range: verification holds two parts' sets beside the ``held`` bytes now
        resident, its slices of candidates and estimates and what DuckDB leaves (a quarter)."""
        two_parts = (self.memory - held - self.memory // 4) // 2
        return min(self.range_bytes(entities), max(two_parts, self.memory // RANGE_FLOOR))

    def planner_sample_events(self, entities: int, per_event: float) -> int:
        """Events of the planner's sample in a run in parts: half a part (its histogram adds an
        inverted index of the sample)."""
        return int(self.range_bytes(entities) / 2 / per_event)

    def keys_stay_held(self, held: int, representatives: int, bands: int) -> bool:
        """Whether a run in one part keeps its bucket keys in memory: beside the ``held`` bytes,
        a slice's signatures and a batch of the band search (an eighth each)."""
        keys = representatives * (bands + 1) * BUCKET_KEY_BYTES
        return held + keys + self.memory // 4 <= self.memory

    def sign_slice_rows(self, positions: int, bands: int, bucket_row_bytes: int) -> int:
        """Representatives signed at a time: their signatures (raw and densified, and polars'
        view: 3 x 8 bytes a position) and bucket rows in an eighth of the budget."""
        per_row = 3 * BYTES_PER_SIGNATURE_VALUE * positions + bucket_row_bytes * bands
        return int(max(MIN_SIGN_SLICE, self.memory // SLICE_SHARE // per_row))

    def band_batch_bytes(self) -> int:
        return max(MIN_BAND_BATCH, self.memory // SLICE_SHARE)

    def verify_slice_rows(self) -> int:
        """Candidates verified at a time: an eighth of the budget."""
        return max(MIN_VERIFY_SLICE, self.memory // SLICE_SHARE // VERIFY_BYTES_PER_PAIR)

    def verify_held_rows(self) -> int:
        """Verified rows a block holds at most when it deduplicates them, those kept and those
        new (pairs repeat, a row per band): half the budget at ``VERIFY_HELD_ROW_BYTES`` a row.
        At 10M long-tailed entities a quarter of the budget at 64 bytes a row, as new rows only,
        let verification peak at 13.4 GiB under a budget of 11.8 (bench/RESULTS.md)."""
        return max(MIN_VERIFY_SLICE, self.memory // VERIFY_HELD_SHARE // VERIFY_HELD_ROW_BYTES)

    def estimate_bytes(self) -> int:
        return self.memory // ESTIMATE_SHARE

    def require_copy(self, what: str, doing: str) -> None:
        """Refuse a budget under 1GiB for work that streams key ranges' signatures into one file:
        the writer and polars' readers take about ``COPY_BYTES`` whatever the size (measured)."""
        if self.memory < PROCESS_BYTES + COPY_BYTES + COPY_MARGIN:
            raise ParameterError(
                f"{what} need more than half of the memory budget ({self.memory / 2**30:.2f} GiB), and {doing} "
                f"them a key range at a time needs at least 1GiB: writing the ranges' signatures into one "
                f"file takes about {COPY_BYTES >> 20} MiB whatever their size (measured); raise --memory")
