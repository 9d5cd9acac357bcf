-- sql/candidate_blocks.sql: candidate pairs -> the same pairs, each with the part (key range of
-- entities, lshjob/jobs/parts.py) of its two sides, so verification can hold two parts at a time.
-- Input : candidate_rows (CANDIDATES, from sql/candidates.sql);
--         temp table part_ranges(part, first_id, last_id): consecutive ranges of entity ids.
-- Output: CANDIDATES (lshjob/contracts/tables.py) with left_part <= right_part (written
--         partitioned by the two parts).
SELECT c.left_rep, c.right_rep, c.bands_shared, l.part AS left_part, r.part AS right_part
FROM candidate_rows AS c
JOIN part_ranges AS l ON c.left_rep BETWEEN l.first_id AND l.last_id
JOIN part_ranges AS r ON c.right_rep BETWEEN r.first_id AND r.last_id
