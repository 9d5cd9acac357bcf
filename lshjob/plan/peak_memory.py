"""Peak memory of a run scaled from runs of a sample (:func:`scale_memory`): what each stage's
peak grows with (:data:`MEMORY_DRIVERS`, in 8-byte words), the counts projected by
:mod:`lshjob.plan.scaling`.

Verification's peak at full size is the deduplication of the verified rows a block holds
(:class:`lshjob.index.verify.local.HeldRows`): it grows with the verified pairs
(:data:`HELD_ROW_WORDS` words a pair), up to what the memory budget lets a block hold
(:meth:`lshjob.runtime.budget.Budget.verify_held_rows`), not with the candidates: they are read a slice of the budget
at a time, and the crowds' pairs made a chunk at a time. After it, the estimates hold a
signature of each set in a pair kept (at most the budget's share): the larger of the two
phases counts.
"""

from __future__ import annotations

from lshjob.plan.cost import STAGES, CostModel, Workload
from lshjob.plan.forecast import SLICE_ROW_BYTES
from lshjob.runtime.budget import VERIFY_HELD_ROW_BYTES, Budget

WORD_BYTES = 8.0  # a stage's peak grows beyond the sample run's by at most a word a word of its driver


def _positions(w: Workload) -> int:
    """Signature positions banded (b x r; r about k / b)."""
    return w.bands * max(w.perms // max(w.bands, 1), 1)


def slice_rows_of(w: Workload, memory: float) -> float:
    """Representatives a run of ``w`` under a ``memory`` budget signs and bands at a time
    (:meth:`lshjob.runtime.budget.Budget.sign_slice_rows`)."""
    return float(Budget(int(memory)).sign_slice_rows(_positions(w), w.bands, SLICE_ROW_BYTES))


def _signed(w: Workload, slice_rows: float | None) -> float:
    """Signature positions held at a time: a slice of representatives, b x r positions each."""
    return min(w.representatives, slice_rows or w.representatives) * _positions(w)


# verification's peak: deduplicating the verified rows a block holds (lshjob.index.verify.local.HeldRows).
# Words a row then: the row (left, right, jaccard, bands: 3.5), copied into one buffer a column
# while its pieces are freed, its intersection and its (pair, intersection, bands) key (2), and the
# rows kept, one a pair, with their Jaccard taken again (4.5 a pair): 93 bytes a row in
# tests/test_scaling.py's probe (136-147 before the rows were copied into one buffer and the pairs
# read from the sorted keys in one pass), so 12: the budget's own figure, which sizes the rows held
# (Budget.verify_held_rows)
HELD_ROW_WORDS = VERIFY_HELD_ROW_BYTES // 8
# rows held at most: the deduplication runs when the rows kept and added pass the budget's bound
# (Budget.verify_held_rows); the top-k cut then keeps what the lists can take. Held: the bound
# while the cut keeps less than three quarters of it (more only when the lists take more)


def _held(w: Workload, memory: float | None) -> float:
    """Verified rows a block holds when it deduplicates them: a row a verified pair (more when a
    pair repeats, a row per band it met in: 1.33 rows a pair at 1M long-tailed entities), at
    most the budget's bound (``memory`` None: no bound)."""
    if memory is None:
        return w.verified_pairs
    return min(w.verified_pairs, float(Budget(int(memory)).verify_held_rows()))


def _estimated(w: Workload, memory: float | None) -> float:
    """Signature positions verification holds for the estimates after it (a set's k positions
    for each set in a verified pair, at most two per verified pair and every representative;
    at most the budget's share, two blocks of sets at a time: lshjob.index.verify.estimates)."""
    sets = min(w.representatives, 2.0 * w.verified_pairs)
    if memory is not None:
        sets = min(sets, Budget(int(memory)).estimate_bytes() / (WORD_BYTES * max(w.perms, 1)))
    return sets * w.perms


def _verify(w: Workload, memory: float | None) -> float:
    """Verification: the sets it holds, and the larger of its two phases' tables: the verified
    rows it deduplicates, then the signatures of the estimates."""
    return w.membership_rows + max(HELD_ROW_WORDS * _held(w, memory), _estimated(w, memory))


# what each stage's peak resident memory grows with, in 8-byte words, given the run's memory
# budget (None: unbounded): the sets it holds, and its own tables (signing and banding a slice
# of representatives at a time; verification the verified rows it holds, the candidates being
# read a slice at a time and the crowds' pairs made a chunk at a time; publishing the pairs it
# keeps)
MEMORY_DRIVERS = {
    "ingest": lambda w, memory: w.events,
    "collapse": lambda w, memory: w.membership_rows,
    "plan": lambda w, memory: w.membership_rows,
    "sign": lambda w, memory: w.membership_rows + _signed(w, _slice(w, memory)),
    "band": lambda w, memory: w.membership_rows + w.bucket_rows + _signed(w, _slice(w, memory)),
    "join": lambda w, memory: w.membership_rows + w.bucket_rows,
    "verify": _verify,
    "publish": lambda w, memory: w.membership_rows + 4 * w.verified_pairs + 4 * w.published_rows,
}


def _slice(w: Workload, memory: float | None) -> float | None:
    return None if memory is None else slice_rows_of(w, memory)



def scale_memory(model: CostModel, runs: list[tuple[Workload, dict, float]], target: Workload,
                 memory: float) -> dict:
    """Peak resident memory per stage at ``target`` from ``runs`` of the sample (each its counts
    and its manifest's ``peak_memory_bytes``), smallest first: the largest run's own peak, and
    beyond it the slope of the line through the runs against :data:`MEMORY_DRIVERS`, at most
    :data:`WORD_BYTES` a word (with one run: above the cost model's constant). Between runs
    of a few ten thousand entities a stage's peak grows mostly with the process's own buffers,
    not with its tables: a slope steeper than a word a word would be scaled 10-60 times over.
    Each run with its memory budget, ``memory`` the target's: they bound the representatives
    signed and banded at a time, and verification's held rows and estimates."""
    out = {}
    for stage in STAGES:
        measured = [(MEMORY_DRIVERS[stage](w, b), float(m[stage])) for w, m, b in runs if m.get(stage)]
        if not measured:
            out[stage] = model.stage_memory(target)[stage]
            continue
        (d0, t0), (d1, t1) = measured[0], measured[-1]
        if d1 > d0:
            slope = (t1 - t0) / (d1 - d0)
        else:
            slope = (t1 - min(max(model.memory[stage].constant, 0.0), t1)) / d1 if d1 > 0 else 0.0
        slope = min(max(slope, 0.0), WORD_BYTES)
        out[stage] = t1 + slope * max(MEMORY_DRIVERS[stage](target, memory) - d1, 0.0)
    return out
