-- sql/reserve.sql: the members of each oversize bucket, held in reserve for verification,
-- which compares a bucket whole when a sample of its members shows lists it would fill
-- (lshjob/index/verify/_reserve.py).
-- Input : sized_bucket_rows, split_rows; $max_bucket (the cap the join took); $reserve_cap.
-- Output: RESERVE (lshjob/index/join/base.py): crowd BIGINT (1, 2, ...), rep BIGINT, band
--         INTEGER, skipped BIGINT (the bucket's pairs that no sub-bucket within the cap holds,
--         the same on each of its rows); one row per (crowd, rep), sorted by crowd then rep.
--         Buckets over $reserve_cap members are not held.
WITH oversize_buckets AS (
    SELECT band, bucket, any_value(size) AS size
    FROM sized_bucket_rows
    WHERE size > $max_bucket AND size <= $reserve_cap
    GROUP BY band, bucket
),
kept_sub_buckets AS (
    SELECT band, bucket, sub, any_value(size) AS size
    FROM split_rows
    WHERE size <= $max_bucket
    GROUP BY band, bucket, sub
),
pairs_kept AS (
    SELECT band, bucket, sum(size * (size - 1) // 2)::BIGINT AS kept
    FROM kept_sub_buckets
    GROUP BY band, bucket
),
held AS (
    SELECT
        o.band,
        o.bucket,
        (o.size * (o.size - 1) // 2 - coalesce(p.kept, 0))::BIGINT AS skipped
    FROM oversize_buckets AS o
    LEFT JOIN pairs_kept AS p USING (band, bucket)
)
SELECT
    dense_rank() OVER (ORDER BY h.band, h.bucket)::BIGINT AS crowd,
    r.rep,
    h.band::INTEGER AS band,
    h.skipped
FROM held AS h
JOIN sized_bucket_rows AS r USING (band, bucket)
ORDER BY crowd, r.rep
