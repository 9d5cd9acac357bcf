"""One memory budget (lshjob/runtime/budget.py): every "one part or several?" decision and
every range size equals the formula its command used before the rules were gathered in one
module.

Oracle: the formulas as they stood at commit be5c9ac, written out here independently of the
package (lshjob/jobs/run.py:160-161, lshjob/audit/check.py:99 and :109,
lshjob/jobs/parts.py:73-92 and :128-168, lshjob/jobs/merge.py:63-76,
lshjob/jobs/prepare.py:73-75, :90, :103-105, :190, :213, lshjob/jobs/parts.py:174-180, :252 and :276,
lshjob/ingest/loading.py:51-56 and :359-367, lshjob/sign/events.py:35-36). Sizes are chosen
on both sides of every threshold, so a "<" for a "<=" fails too.
"""

from __future__ import annotations

import itertools
import math

import pytest

from lshjob.errors import ParameterError
from lshjob.runtime import budget
from lshjob.runtime.budget import Budget

MIB, GIB = 2**20, 2**30
MEMORIES = [512 * MIB, 700 * 10**6, GIB, 4 * 10**9, 8 * GIB, 64 * GIB]
PARTS = [None, 1, 2, 7]
PERMS = [16, 128, 256]


# ---- the formulas at be5c9ac, written out ------------------------------------------------
def old_dense_span(entity_range, events):  # loading.py:359-367
    if entity_range is None:
        return 0
    span = entity_range[1] - entity_range[0] + 1
    return span if span <= max(events // 4, 1 << 16) and span < 2**32 else 0


def old_grouping_bytes(events, weighted, span):  # loading.py:51-56
    if span:
        return events * (16 if weighted else 8) + span * 8
    return events * (36 if weighted else 20)


def old_part_budget(memory, entities, share=None):  # parts.py:82-92 (held_bytes: 256 MiB + 32 an entity)
    return int(max((share or 0.5) * (memory - ((256 << 20) + entities * 32)), memory // 10))


def old_run_one_part(need, memory, parts):  # run.py:160-161 (in parts when true; negated here)
    in_parts = (parts or 0) > 1 or (parts is None and need > 0.5 * memory)
    return not in_parts


def old_audit_one_part(need, memory, parts):  # audit/check.py:99
    return parts == 1 or (parts is None and need <= 0.5 * memory)


def old_sign_one_part(events, entities, weighted, entity_range, memory, parts, perms):  # parts.py:128-148
    if parts == 1:
        return True
    usable = memory - 4 * (1 << 16) * 8 * perms
    need = old_grouping_bytes(events, weighted, old_dense_span(entity_range, events))
    span = old_dense_span(entity_range, events) or events
    if parts is None and need + min(events, span) * 40 <= 0.5 * usable:
        return True
    if parts is None and need + entities * 40 <= 0.5 * usable:
        return True
    return False


def old_keyed_one_part(events, memory, parts, perms):  # parts.py:150-168
    if parts == 1:
        return True
    usable = memory - 4 * (1 << 16) * 8 * perms
    return parts is None and events * 256 <= 0.5 * usable


def old_merge_one_part(rows, memory, parts, perms):  # merge.py:63-65
    per_row = 4 * (8 * perms + 40)
    return parts == 1 or (parts is None and rows * per_row <= 0.5 * memory)


# ---- the decisions as the commands now make them -------------------------------------------
def run_or_audit(events, weighted, entity_range, memory, parts):
    need = budget.grouping_bytes(events, weighted, budget.dense_span(entity_range, events))
    return Budget(memory, parts).one_part(need)


def sign_one_set_per_entity(events, entities, weighted, entity_range, memory, parts, perms):
    limit, reserve = Budget(memory, parts), budget.writer_reserve(perms)
    grouping = budget.grouping_bytes(events, weighted, budget.dense_span(entity_range, events))
    bound = min(events, budget.dense_span(entity_range, events) or events)
    return (limit.one_part(budget.signing_need(grouping, bound), reserve)
            or limit.one_part(budget.signing_need(grouping, entities), reserve))


def sizes_around(memory):
    """Event counts on both sides of each formula's threshold at ``memory``, and some fixed ones."""
    fixed = [0, 1, 1000, 10**6, 3 * 10**7, 10**9]
    edges = []
    for per_event, reserve in itertools.product((8, 16, 20, 36, 256), [0] + [4 * (1 << 16) * 8 * k for k in PERMS]):
        edge = int(0.5 * (memory - reserve) // per_event)  # sign and keyed: what the writer's slices leave
        edges += [edge - 1, edge, edge + 1]
    return sorted(set(fixed + [e for e in edges if e >= 0]))


def test_the_one_decision_equals_the_five_formulas_over_a_grid():
    checked = 0
    for memory in MEMORIES:
        for events, weighted, parts in itertools.product(sizes_around(memory), (False, True), PARTS):
            for entities in {1, max(1, events // 40), max(1, events)}:
                for entity_range in (None, (7, 6 + entities), (0, 10 * entities + 2**20)):
                    need_args = (events, weighted, entity_range, memory, parts)
                    old_need = old_grouping_bytes(events, weighted, old_dense_span(entity_range, events))
                    assert run_or_audit(*need_args) == old_run_one_part(old_need, memory, parts), need_args
                    assert run_or_audit(*need_args) == old_audit_one_part(old_need, memory, parts), need_args
                    for perms in PERMS:
                        assert (sign_one_set_per_entity(events, entities, weighted, entity_range, memory, parts, perms)
                                == old_sign_one_part(events, entities, weighted, entity_range, memory, parts, perms))
                    checked += 1
            for perms in PERMS:
                keyed = Budget(memory, parts).one_part(budget.keyed_need(events), budget.writer_reserve(perms))
                assert keyed == old_keyed_one_part(events, memory, parts, perms), (events, memory, parts, perms)
                rows = events // 64  # signature rows on both sides of the merge's threshold too
                for r in (rows, int(0.5 * memory // (4 * (8 * perms + 40))) + (events % 3) - 1):
                    merged = Budget(memory, parts).one_part(budget.merge_need(max(r, 0), perms))
                    assert merged == old_merge_one_part(max(r, 0), memory, parts, perms), (r, memory, parts, perms)
    assert checked > 20_000


def test_each_decision_goes_both_ways_on_the_grid():
    # The grid reaches both answers of every decision (else the equality above would be empty).
    memory = GIB
    edge = int(0.5 * memory // 20)
    assert run_or_audit(edge, False, None, memory, None) and not run_or_audit(edge + 1, False, None, memory, None)
    usable = memory - 4 * (1 << 16) * 8 * 128
    keyed_edge = int(0.5 * usable // 256)
    reserve = budget.writer_reserve(128)
    assert Budget(memory).one_part(budget.keyed_need(keyed_edge), reserve)
    assert not Budget(memory).one_part(budget.keyed_need(keyed_edge + 1), reserve)


def test_range_sizes_equal_the_formulas_over_a_grid():
    for memory, entities, perms in itertools.product(MEMORIES, [0, 1, 10**5, 10**7, 10**8], PERMS):
        usable = memory - 4 * (1 << 16) * 8 * perms
        b = Budget(memory)
        assert b.range_bytes(entities) == old_part_budget(memory, entities)  # run: prepare.py:104
        assert b.range_bytes(entities, budget.AUDIT_PART_SHARE) == old_part_budget(memory, entities, 0.25)
        assert (b.range_bytes(entities, budget.SIGN_PART_SHARE, budget.writer_reserve(perms))
                == old_part_budget(usable, entities, 0.75))  # parts.py:146 and :165
        assert b.range_bytes(entities, budget.MERGE_PART_SHARE) == old_part_budget(memory, entities, 0.75)
        for held in (0, 300 * MIB, memory // 2, memory):
            old = min(old_part_budget(memory, entities), max((memory - held - memory // 4) // 2, memory // 10))
            assert b.run_range_bytes(entities, held) == old  # prepare.py:103-105
        for per_event in (8, 8.5, 20, 36):
            old = int(old_part_budget(memory, entities) / 2 / per_event)  # prepare.py:90
            assert b.planner_sample_events(entities, per_event) == old


def test_slices_and_batches_equal_the_formulas_over_a_grid():
    for memory in MEMORIES:
        b = Budget(memory)
        assert b.verify_slice_rows() == max(1_000_000, memory // 8 // 64)  # parts.py:252
        assert b.estimate_bytes() == memory // 16  # parts.py:276
        assert b.band_batch_bytes() == max(64 << 20, memory // 8)  # prepare.py:213
        for positions, bands in ((128, 32), (64, 64), (10, 2), (1, 1)):
            old = int(max(10_000, memory // 8 // (3 * 8 * positions + 28 * bands)))  # prepare.py:190
            assert b.sign_slice_rows(positions, bands, 28) == old
        for held, reps, bands in itertools.product((0, 200 * MIB, memory // 2), (0, 10**5, 10**7, 10**8), (1, 20)):
            spill = held + reps * (bands + 1) * 8 + memory // 4 > memory  # prepare.py:73-75
            assert b.keys_stay_held(held, reps, bands) == (not spill)


def test_the_copy_budget_is_refused_under_one_gib():
    # parts.py:174-180 at be5c9ac: refused when memory < 256 MiB + 512 MiB + 256 MiB
    with pytest.raises(ParameterError, match="a key range at a time needs at least 1GiB"):
        Budget(GIB - 1).require_copy("loans.parquet: the sets", "signing")
    Budget(GIB).require_copy("loans.parquet: the sets", "signing")


def test_grouping_costs_equal_the_loader_formula():
    for events, weighted in itertools.product((0, 1, 4 * 10**5, 10**8), (False, True)):
        for entity_range in (None, (0, 999), (5, 5 + events // 4), (0, 2**40)):
            span = old_dense_span(entity_range, events)
            assert budget.dense_span(entity_range, events) == span
            assert budget.grouping_bytes(events, weighted, span) == old_grouping_bytes(events, weighted, span)
            # parts.py:73-79: bytes an event with the range's table spread over the events
            old = ((16 if weighted else 8) + 8 * span / max(events, 1)) if span else (36 if weighted else 20)
            assert math.isclose(budget.bytes_per_event(events, weighted, entity_range), old)


def test_one_share_moves_every_decision(monkeypatch):
    # The share lives in one place: changing it (as the tests of runs in parts do) turns every
    # command to parts, however small its need, and a share of 1 lets more in.
    memory = GIB
    assert all([Budget(memory).one_part(1), Budget(memory).one_part(1, budget.writer_reserve(128))])
    monkeypatch.setattr(budget, "ONE_PART_SHARE", 1e-12)
    assert not run_or_audit(1000, False, None, memory, None)
    assert not sign_one_set_per_entity(1000, 10, False, None, memory, None, 128)
    assert not Budget(memory).one_part(budget.keyed_need(1000), budget.writer_reserve(128))
    assert not Budget(memory).one_part(budget.merge_need(10, 128))
    assert run_or_audit(1000, False, None, memory, 1)  # --parts 1 still holds everything
