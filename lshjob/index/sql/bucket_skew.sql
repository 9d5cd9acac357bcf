-- sql/bucket_skew.sql: the bucket-size profile and what the size cap cost.
-- Input : sized_bucket_rows (shared buckets only), split_rows; $max_bucket; $bucket_rows, the
--         number of all bucket rows (buckets of one = $bucket_rows - rows in shared buckets).
-- Output: one row: buckets, buckets with a pair, oversize buckets, the rows in them, the pairs
--         they hold, the pairs their split keeps, the pairs left out (held minus kept),
--         sub-buckets still over the cap, the pairs of buckets within the cap, the largest bucket.
WITH bucket_sizes AS (
    SELECT band, bucket, any_value(size) AS size
    FROM sized_bucket_rows
    GROUP BY band, bucket
),
sub_sizes AS (
    SELECT band, bucket, sub, any_value(size) AS size
    FROM split_rows
    GROUP BY band, bucket, sub
),
split_summary AS (
    SELECT
        coalesce(sum(size * (size - 1) // 2) FILTER (WHERE size BETWEEN 2 AND $max_bucket), 0)::HUGEINT
            AS split_pairs,
        count(*) FILTER (WHERE size > $max_bucket) AS oversize_sub_buckets
    FROM sub_sizes
),
bucket_summary AS (
    SELECT
        $bucket_rows - coalesce(sum(size), 0) + count(*) AS buckets,
        count(*) AS buckets_with_pairs,
        count(*) FILTER (WHERE size > $max_bucket) AS oversize_buckets,
        coalesce(sum(size) FILTER (WHERE size > $max_bucket), 0)::BIGINT AS oversize_rows,
        coalesce(sum(size * (size - 1) // 2) FILTER (WHERE size > $max_bucket), 0)::HUGEINT AS oversize_pairs,
        coalesce(sum(size * (size - 1) // 2) FILTER (WHERE size BETWEEN 2 AND $max_bucket), 0)::HUGEINT
            AS bucket_pairs,
        coalesce(max(size), 0) AS largest_bucket
    FROM bucket_sizes
)
SELECT
    b.buckets,
    b.buckets_with_pairs,
    b.oversize_buckets,
    b.oversize_rows,
    b.oversize_pairs,
    s.split_pairs,
    b.oversize_pairs - s.split_pairs AS skipped_pairs,
    s.oversize_sub_buckets,
    b.bucket_pairs,
    b.largest_bucket
FROM bucket_summary AS b, split_summary AS s
