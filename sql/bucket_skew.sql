-- sql/bucket_skew.sql: what the bucket-size cap left out, and the bucket-size profile.
-- Input : read_parquet($bucket_files) (band, bucket, rep); $max_bucket.
-- Output: one row: buckets, buckets with a pair, oversize buckets, the rows in them,
--         the pairs they would have produced, the largest bucket.
WITH bucket_sizes AS (
    SELECT band, bucket, count(*) AS size
    FROM read_parquet($bucket_files)
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
