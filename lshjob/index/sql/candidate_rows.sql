-- sql/candidate_rows.sql: bucket rows -> candidate pairs, one row per band a pair met in.
-- Input : sized_bucket_rows (sql/sized_bucket_rows.sql), split_rows (sql/split_oversize.sql);
--         $max_bucket; $crowd_size.
-- Output: CANDIDATES (lshjob/contracts/tables.py) with bands_shared = 1 on every row: a pair
--         met in three bands takes three rows, and verification sums them. No GROUP BY: on
--         long-tailed data nearly every pair meets in one band only, and deduplicating tens of
--         millions of pairs cost about seven times the join itself (docs/performance.md);
--         the few pairs that reach the threshold are deduplicated after verification.
-- Buckets (or sub-buckets) of $crowd_size members or more are not paired here: sql/crowds.sql
-- lists their members and verification pairs them up (lshjob/index/join/base.py).
-- The same usable rows as sql/candidates.sql; sub-buckets still over the cap are left out.
WITH usable_rows AS (
    SELECT band, bucket, 0::UBIGINT AS sub, rep
    FROM sized_bucket_rows
    WHERE size >= 2 AND size <= $max_bucket AND size < $crowd_size
    UNION ALL
    SELECT band, bucket, sub, rep
    FROM split_rows
    WHERE size >= 2 AND size <= $max_bucket AND size < $crowd_size
)
SELECT a.rep AS left_rep, b.rep AS right_rep, 1::INTEGER AS bands_shared
FROM usable_rows AS a
JOIN usable_rows AS b
  ON a.band = b.band AND a.bucket = b.bucket AND a.sub = b.sub AND a.rep < b.rep
