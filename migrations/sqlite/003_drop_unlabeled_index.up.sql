-- classwatch SQLite schema, version 3: no index of unlabeled predictions.
--
-- The partial index predictions_unlabeled cost every prediction insert a
-- second B-tree insert and every first label a delete from it. The label
-- timeout job now finds the buckets that still hold unlabeled predictions
-- from the maintained counts (predicted count above labeled count) and
-- reads only those buckets' rows through predictions_bucket.
DROP INDEX IF EXISTS predictions_unlabeled;
