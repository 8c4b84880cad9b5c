-- classwatch SQLite schema, version 2: per-bucket score aggregates (the
-- store package documents their meaning; sums are integer counts of 1e-9
-- units, so corrections and recounts are exact).
--
--   * predicted_counts.scored counts the predictions of the row that carry
--     scores;
--   * score_counts counts, per class, the scored predictions whose score
--     for the class lies in a bin above 0 (bin 0, which also holds a
--     missing score, is the scored count less the other bins);
--   * score_labels holds, per bin of the predicted class's score, the
--     labeled scored predictions: how many, the sum of that score, how many
--     are labeled with the predicted class, and their Brier sum. They move
--     with the current label, in the label's transaction.
-- Predictions stored before this version count in none of them, so
-- Verify reports score differences in the buckets that still hold such
-- predictions, until retention purges them.
ALTER TABLE predicted_counts ADD COLUMN scored INTEGER NOT NULL DEFAULT 0;

CREATE TABLE score_counts (
    model_id INTEGER NOT NULL REFERENCES models (id),
    bucket   INTEGER NOT NULL,
    segment  TEXT    NOT NULL,
    class    TEXT    NOT NULL,
    bin      INTEGER NOT NULL,
    n        INTEGER NOT NULL,
    PRIMARY KEY (model_id, bucket, segment, class, bin)
) WITHOUT ROWID;

CREATE TABLE score_labels (
    model_id  INTEGER NOT NULL REFERENCES models (id),
    bucket    INTEGER NOT NULL,
    segment   TEXT    NOT NULL,
    bin       INTEGER NOT NULL,
    n         INTEGER NOT NULL,
    score_sum INTEGER NOT NULL,
    correct   INTEGER NOT NULL,
    brier_sum INTEGER NOT NULL,
    PRIMARY KEY (model_id, bucket, segment, bin)
) WITHOUT ROWID;
