-- sql/crowds.sql: the members of each crowd, a usable bucket (or sub-bucket of an oversize one)
-- of $crowd_size members or more, whose pairs verification makes itself.
-- Input : sized_bucket_rows, split_rows; $max_bucket; $crowd_size.
-- Output: CROWDS (lshjob/index/join/base.py): crowd BIGINT (1, 2, ...), rep BIGINT, band INTEGER
--         (the crowd's band); one row per (crowd, rep), sorted by crowd then rep. Every pair
--         of a crowd's members is a candidate that met in that band (bands_shared 1 for this
--         row of the pair). A rep is in one bucket (and sub-bucket) a band, so in one crowd a
--         band at most.
WITH crowd_rows AS (
    SELECT band, bucket, 0::UBIGINT AS sub, rep
    FROM sized_bucket_rows
    WHERE size >= $crowd_size AND size <= $max_bucket
    UNION ALL
    SELECT band, bucket, sub, rep
    FROM split_rows
    WHERE size >= $crowd_size AND size <= $max_bucket
)
SELECT dense_rank() OVER (ORDER BY band, bucket, sub)::BIGINT AS crowd, rep, band::INTEGER AS band
FROM crowd_rows
ORDER BY crowd, rep
