-- classwatch PostgreSQL schema, version 2: label batches of one model run
-- side by side.
--
-- Each label version of a prediction gets a sequence number, 1 for its
-- first version, and the unique index on (model_id, pkey, seq) replaces the
-- plain (model_id, pkey) index (bucket, the partition key, must be part of
-- a unique index on a partitioned table; a prediction's versions all share
-- its bucket). A label batch numbers the versions it adds after the ones it
-- read, so two batches that add a version to the same prediction at once
-- insert the same key: the second waits for the first, fails when it
-- commits and is retried, reading the first one's version. Label batches
-- thus no longer need to exclude each other; pgstore's package
-- documentation explains the locking.
ALTER TABLE label_versions ADD COLUMN seq integer NOT NULL DEFAULT 0;

UPDATE label_versions v SET seq = r.seq
FROM (
    SELECT model_id, pkey, bucket, implied, at, actual,
           row_number() OVER (PARTITION BY model_id, pkey ORDER BY at, implied, actual)::integer AS seq
    FROM label_versions
) r
WHERE v.model_id = r.model_id AND v.pkey = r.pkey AND v.bucket = r.bucket
  AND v.implied = r.implied AND v.at = r.at AND v.actual = r.actual;

DROP INDEX label_versions_prediction;

CREATE UNIQUE INDEX label_versions_prediction ON label_versions (model_id, pkey, seq, bucket);

-- The maintained counts are updated in place, a label batch touching about
-- one cell row per label; room left in each page lets PostgreSQL keep the
-- new row version on the same page (a HOT update), with no index insert.
ALTER TABLE cells SET (fillfactor = 50);
ALTER TABLE predicted_counts SET (fillfactor = 50);
