-- sql/bucket_skew.sql: what the bucket-size cap left out, and the bucket-size profile.
-- Input : sized_bucket_rows (sql/sized_bucket_rows.sql); $max_bucket.
-- Output: one row: buckets, buckets with a pair, oversize buckets, the rows in them,
--         the pairs they would have produced, the pairs of usable buckets, the largest bucket.
WITH bucket_sizes AS (
    SELECT band, bucket, any_value(size) AS size
    FROM sized_bucket_rows
    GROUP BY band, bucket
)
SELECT
    count(*) AS buckets,
    count(*) FILTER (WHERE size >= 2) AS buckets_with_pairs,
    count(*) FILTER (WHERE size > $max_bucket) AS oversize_buckets,
    coalesce(sum(size) FILTER (WHERE size > $max_bucket), 0)::BIGINT AS oversize_rows,
    coalesce(sum(size * (size - 1) // 2) FILTER (WHERE size > $max_bucket), 0)::HUGEINT AS skipped_pairs,
    coalesce(sum(size * (size - 1) // 2) FILTER (WHERE size BETWEEN 2 AND $max_bucket), 0)::HUGEINT AS bucket_pairs,
    coalesce(max(size), 0) AS largest_bucket
FROM bucket_sizes
