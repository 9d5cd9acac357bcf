-- sql/sized_bucket_rows.sql: bucket rows with the size of their bucket, read once.
-- Input : read_parquet($bucket_files) with columns band, bucket, rep (lshjob/band.py).
-- Output: temporary table sized_bucket_rows(band, bucket, rep, size).
CREATE OR REPLACE TEMP TABLE sized_bucket_rows AS
SELECT
    band,
    bucket,
    rep,
    count(*) OVER (PARTITION BY band, bucket) AS size
FROM read_parquet($bucket_files)
