-- sql/candidates.sql: bucket rows -> candidate pairs, one row per unordered pair.
-- Input : read_parquet($bucket_files) with columns band, bucket, rep (one row per
--         representative and band; see lshjob/band.py).
-- Output: left_rep < right_rep, bands_shared = number of bands whose bucket they share.
-- Buckets holding more than $max_bucket representatives are left out (reported by
-- sql/bucket_skew.sql); buckets of one yield no pair.
WITH bucket_rows AS (
    SELECT band, bucket, rep
    FROM read_parquet($bucket_files)
),
bucket_sizes AS (
    SELECT band, bucket, count(*) AS size
    FROM bucket_rows
    GROUP BY band, bucket
),
usable_rows AS (
    SELECT r.band, r.bucket, r.rep
    FROM bucket_rows AS r
    JOIN bucket_sizes AS s USING (band, bucket)
    WHERE s.size BETWEEN 2 AND $max_bucket
),
pairs_per_band AS (
    SELECT a.rep AS left_rep, b.rep AS right_rep
    FROM usable_rows AS a
    JOIN usable_rows AS b
      ON a.band = b.band AND a.bucket = b.bucket AND a.rep < b.rep
)
SELECT left_rep, right_rep, count(*)::INTEGER AS bands_shared
FROM pairs_per_band
GROUP BY left_rep, right_rep
ORDER BY left_rep, right_rep
