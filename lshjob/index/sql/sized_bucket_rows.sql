-- sql/sized_bucket_rows.sql: the bucket rows that can form a pair, with their bucket's size.
-- Input : read_parquet($bucket_files): BUCKET_ROWS (lshjob/contracts/tables.py).
-- Output: temporary table sized_bucket_rows(band, bucket, rep, size), size >= 2.
-- Most buckets hold one representative and can form no pair; they are counted here (by
-- sql/bucket_skew.sql from the row total) but not carried on, so later joins see only
-- the shared buckets.
CREATE OR REPLACE TEMP TABLE sized_bucket_rows AS
WITH bucket_rows AS (
    SELECT band, bucket, rep
    FROM read_parquet($bucket_files)
),
shared_buckets AS (
    SELECT band, bucket, count(*) AS size
    FROM bucket_rows
    GROUP BY band, bucket
    HAVING count(*) >= 2
)
SELECT r.band, r.bucket, r.rep, s.size
FROM bucket_rows AS r
JOIN shared_buckets AS s USING (band, bucket)
