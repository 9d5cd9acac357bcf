-- sql/split_oversize.sql: split buckets over the size cap by the next band's bucket.
-- Input : sized_bucket_rows (sql/sized_bucket_rows.sql); $max_bucket; $bands.
-- Output: temporary table split_rows(band, bucket, sub, rep, size): each row of an oversize
--         bucket of band j, keyed further by the representative's bucket in band (j+1) mod b.
-- Members of one sub-bucket agree on 2r signature positions instead of r, so a crowd of
-- weakly similar sets falls apart while strongly similar pairs stay together. A member
-- alone in its next-band bucket (not in sized_bucket_rows) would be alone in its
-- sub-bucket too, so the inner join drops it without losing a pair.
CREATE OR REPLACE TEMP TABLE split_rows AS
WITH oversize_rows AS (
    SELECT band, bucket, rep
    FROM sized_bucket_rows
    WHERE size > $max_bucket
),
keyed_by_next_band AS (
    SELECT o.band, o.bucket, n.bucket AS sub, o.rep
    FROM oversize_rows AS o
    JOIN sized_bucket_rows AS n
      ON n.rep = o.rep AND n.band = (o.band + 1) % $bands
)
SELECT
    band,
    bucket,
    sub,
    rep,
    count(*) OVER (PARTITION BY band, bucket, sub) AS size
FROM keyed_by_next_band
