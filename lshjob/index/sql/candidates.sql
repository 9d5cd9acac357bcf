-- sql/candidates.sql: bucket rows -> candidate pairs, one row per unordered pair.
-- Input : sized_bucket_rows (sql/sized_bucket_rows.sql), split_rows (sql/split_oversize.sql);
--         $max_bucket.
-- Output: CANDIDATES (lshjob/contracts/tables.py); bands_shared counts the bands through which
--         the pair met (a bucket within the cap, or a sub-bucket of an oversize one).
-- Sub-buckets still over the cap are left out (reported by sql/bucket_skew.sql).
WITH usable_rows AS (
    SELECT band, bucket, 0::UBIGINT AS sub, rep
    FROM sized_bucket_rows
    WHERE size BETWEEN 2 AND $max_bucket
    UNION ALL
    SELECT band, bucket, sub, rep
    FROM split_rows
    WHERE size BETWEEN 2 AND $max_bucket
),
pairs_per_band AS (
    SELECT a.rep AS left_rep, b.rep AS right_rep
    FROM usable_rows AS a
    JOIN usable_rows AS b
      ON a.band = b.band AND a.bucket = b.bucket AND a.sub = b.sub AND a.rep < b.rep
)
SELECT left_rep, right_rep, count(*)::INTEGER AS bands_shared
FROM pairs_per_band
GROUP BY left_rep, right_rep
