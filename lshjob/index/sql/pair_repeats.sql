-- sql/pair_repeats.sql: how often pairs repeat across bands, on a sample of left sides.
-- Input : sized_bucket_rows, split_rows; $max_bucket; $every (a pair is sampled when its
--         left representative's id is a multiple of $every: all of a pair's rows or none).
-- Output: one row: pair_rows (rows of the sampled pairs, one per band), pairs (distinct).
-- The join engine leaves deduplication to verification when pairs rarely repeat
-- (lshjob/index/join/duckdb.py).
WITH usable_rows AS (
    SELECT band, bucket, 0::UBIGINT AS sub, rep
    FROM sized_bucket_rows
    WHERE size BETWEEN 2 AND $max_bucket
    UNION ALL
    SELECT band, bucket, sub, rep
    FROM split_rows
    WHERE size BETWEEN 2 AND $max_bucket
),
sampled_rows AS (
    SELECT a.rep AS left_rep, b.rep AS right_rep
    FROM usable_rows AS a
    JOIN usable_rows AS b
      ON a.band = b.band AND a.bucket = b.bucket AND a.sub = b.sub AND a.rep < b.rep
    WHERE a.rep % $every = 0
)
SELECT count(*) AS pair_rows, count(DISTINCT (left_rep, right_rep)) AS pairs
FROM sampled_rows
