package sqlitestore

import (
	"strconv"
	"strings"
)

// Every statement the store runs is one of these constants, except the
// multi-row prediction insert, whose row list insertPredictionsSQL repeats
// for each of the few fixed chunk sizes. Times are bound as Unix
// microseconds.

// Schema versions.
const (
	sqlCreateVersionTable = `CREATE TABLE IF NOT EXISTS schema_version (
    version    INTEGER PRIMARY KEY,
    name       TEXT    NOT NULL,
    applied_at INTEGER NOT NULL
)`
	sqlHasVersionTable = `SELECT EXISTS (SELECT 1 FROM sqlite_schema WHERE type = 'table' AND name = 'schema_version')`
	sqlSchemaVersion   = `SELECT COALESCE(MAX(version), 0) FROM schema_version`
	sqlRecordVersion   = `INSERT INTO schema_version (version, name, applied_at) VALUES (?, ?, ?)`
)

// Model registry.
const (
	sqlModelID     = `SELECT id FROM models WHERE name = ?`
	sqlInsertModel = `INSERT INTO models (name) VALUES (?)`
	sqlClasses     = `SELECT name FROM model_classes WHERE model_id = ? ORDER BY position`
	sqlInsertClass = `INSERT INTO model_classes (model_id, position, name) VALUES (?, ?, ?)`
	sqlModels      = `SELECT id, name, latest_at, predictions, labeled FROM models ORDER BY name`
	sqlAllClasses  = `SELECT model_id, name FROM model_classes ORDER BY model_id, position`
	// sqlModelTotals adds a call's stored predictions and newly labeled ones
	// and raises latest_at.
	sqlModelTotals = `UPDATE models
SET predictions = predictions + ?2,
    labeled = labeled + ?3,
    latest_at = CASE WHEN ?4 IS NULL THEN latest_at
                     WHEN latest_at IS NULL OR ?4 > latest_at THEN ?4
                     ELSE latest_at END
WHERE id = ?1`
)

// Prediction ingest.
const (
	sqlInsertPrediction = `INSERT INTO predictions (model_id, id, at, bucket, segment, predicted, scores, received_at)
VALUES (?, ?, ?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, id) DO NOTHING`
	sqlPredictionContent = `SELECT at, segment, predicted, scores FROM predictions WHERE model_id = ? AND id = ?`
	sqlHasEarly          = `SELECT EXISTS (SELECT 1 FROM early_labels WHERE model_id = ?)`
	sqlEarlyFor          = `SELECT at, actual, received_at FROM early_labels WHERE model_id = ? AND id = ?`
	sqlDeleteEarlyFor    = `DELETE FROM early_labels WHERE model_id = ? AND id = ?`
	sqlAddPredicted      = `INSERT INTO predicted_counts (model_id, bucket, segment, predicted, n, scored)
VALUES (?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, bucket, segment, predicted) DO UPDATE SET n = n + excluded.n, scored = scored + excluded.scored`
	sqlAddScore = `INSERT INTO score_counts (model_id, bucket, segment, class, bin, n)
VALUES (?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, bucket, segment, class, bin) DO UPDATE SET n = n + excluded.n`
	sqlAddScoreLabel = `INSERT INTO score_labels (model_id, bucket, segment, bin, n, score_sum, correct, brier_sum)
VALUES (?, ?, ?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, bucket, segment, bin) DO UPDATE SET n = n + excluded.n, score_sum = score_sum + excluded.score_sum,
    correct = correct + excluded.correct, brier_sum = brier_sum + excluded.brier_sum`
)

// insertChunks returns the row counts of the multi-row prediction inserts,
// largest first; a batch is cut into chunks of these sizes and a remainder
// below the smallest goes in line by line. A chunk spends the per-statement
// work (stepping, the driver's bookkeeping) once for all its rows; past
// about a hundred rows the saving flattens out.
func insertChunks() []int { return []int{100, 10} }

// chunkFor returns the largest chunk size that fits in n > 0 lines, or 1.
func chunkFor(n int) int {
	for _, size := range insertChunks() {
		if size <= n {
			return size
		}
	}
	return 1
}

// insertPredictionsSQL is the insert of rows predictions. It has no conflict
// clause: a key already stored fails the whole statement.
func insertPredictionsSQL(rows int) string {
	return listSQL("INSERT INTO predictions (model_id, id, at, bucket, segment, predicted, scores, received_at)\nVALUES ",
		rows, same("(?, ?, ?, ?, ?, ?, ?, ?)"), "")
}

// lookupLabelsSQL reads the join keys and current labels of rows
// predictions of model ?1, whose ids are ?2 on.
func lookupLabelsSQL(rows int) string {
	return listSQL("SELECT id, bucket, segment, predicted, label, label_at, label_implied, scores FROM predictions\nWHERE model_id = ?1 AND id IN (",
		rows, func(i int) string { return "?" + strconv.Itoa(i+2) }, ")")
}

// insertVersionsSQL inserts rows real label versions (model, id, at,
// actual, received) and returns those that were new.
func insertVersionsSQL(rows int) string {
	return listSQL("INSERT INTO label_versions (model_id, id, at, actual, received_at, implied)\nVALUES ",
		rows, same("(?, ?, ?, ?, ?, 0)"), "\nON CONFLICT (model_id, id, implied, at, actual) DO NOTHING\nRETURNING model_id, id, at, actual")
}

// setLabelsSQL sets the current label of rows predictions to a real
// version, each row (model, id, label, label_at).
func setLabelsSQL(rows int) string {
	return listSQL("UPDATE predictions SET label = v.column3, label_at = v.column4, label_implied = 0\nFROM (VALUES ",
		rows, same("(?, ?, ?, ?)"), ") AS v\nWHERE predictions.model_id = v.column1 AND predictions.id = v.column2")
}

// listSQL is head, then item(0) to item(rows-1) separated by ", ", then
// tail: the multi-row statements above repeat a row or a parameter.
func listSQL(head string, rows int, item func(i int) string, tail string) string {
	var b strings.Builder
	b.WriteString(head)
	for i := range rows {
		if i > 0 {
			b.WriteString(", ")
		}
		b.WriteString(item(i))
	}
	b.WriteString(tail)
	return b.String()
}

// same returns an item function that repeats s.
func same(s string) func(int) string { return func(int) string { return s } }

// Label ingest.
const (
	sqlPredictionLabel = `SELECT bucket, segment, predicted, label, label_at, label_implied
FROM predictions WHERE model_id = ? AND id = ?`
	sqlInsertEarly = `INSERT INTO early_labels (model_id, id, at, actual, received_at)
VALUES (?, ?, ?, ?, ?)
ON CONFLICT (model_id, id, at, actual) DO NOTHING`
	sqlInsertVersion = `INSERT INTO label_versions (model_id, id, implied, at, actual, received_at)
VALUES (?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, id, implied, at, actual) DO NOTHING`
	sqlSetLabel = `UPDATE predictions SET label = ?, label_at = ?, label_implied = ?
WHERE model_id = ? AND id = ?`
	sqlAddCell = `INSERT INTO cells (model_id, bucket, segment, actual, predicted, n)
VALUES (?, ?, ?, ?, ?, ?)
ON CONFLICT (model_id, bucket, segment, actual, predicted) DO UPDATE SET n = n + excluded.n`
)

// Maintenance. The label-timeout statements share one predicate: unlabeled
// predictions of model ?1 with at ≤ ?2 (now − timeout) in the buckets of
// the JSON array ?6, which sqlIncompleteBuckets lists: the buckets starting
// at or before ?2, and not before the model's purge cutoff (whose raw rows
// are gone while their counts stay), whose maintained predicted count is
// above their labeled count. So each run reads only the rows of buckets
// that still hold unlabeled predictions, through predictions_bucket.
const (
	sqlIncompleteBuckets = `WITH kept AS (
    SELECT purged_before AS since FROM models WHERE id = ?1
), p AS (
    SELECT bucket, SUM(n) AS n FROM predicted_counts, kept
    WHERE model_id = ?1 AND bucket <= ?2 AND (kept.since IS NULL OR bucket >= kept.since) GROUP BY bucket
), l AS (
    SELECT bucket, SUM(n) AS n FROM cells, kept
    WHERE model_id = ?1 AND bucket <= ?2 AND (kept.since IS NULL OR bucket >= kept.since) GROUP BY bucket
)
SELECT json_group_array(p.bucket) FROM p LEFT JOIN l ON l.bucket = p.bucket WHERE p.n > COALESCE(l.n, 0)`
	sqlDueGroups = `SELECT bucket, segment, predicted, COUNT(*) FROM predictions
WHERE model_id = ?1 AND bucket IN (SELECT value FROM json_each(?6)) AND label IS NULL AND at <= ?2
GROUP BY bucket, segment, predicted`
	sqlDueScored = `SELECT bucket, segment, predicted, scores FROM predictions
WHERE model_id = ?1 AND bucket IN (SELECT value FROM json_each(?6)) AND label IS NULL AND at <= ?2 AND scores IS NOT NULL`
	sqlInsertImplied = `INSERT INTO label_versions (model_id, id, implied, at, actual, received_at)
SELECT model_id, id, 1, at + ?3, ?4, ?5 FROM predictions
WHERE model_id = ?1 AND bucket IN (SELECT value FROM json_each(?6)) AND label IS NULL AND at <= ?2`
	sqlSetImplied = `UPDATE predictions SET label = ?4, label_at = at + ?3, label_implied = 1
WHERE model_id = ?1 AND bucket IN (SELECT value FROM json_each(?6)) AND label IS NULL AND at <= ?2`
	sqlExpireEarly = `DELETE FROM early_labels WHERE model_id = ? AND received_at <= ?`
	sqlPurgeTotals = `SELECT COUNT(*), COUNT(label) FROM predictions WHERE model_id = ? AND bucket < ?`
	sqlPurgeLabels = `DELETE FROM label_versions
WHERE model_id = ?1 AND id IN (SELECT id FROM predictions WHERE model_id = ?1 AND bucket < ?2)`
	sqlPurgePredictions = `DELETE FROM predictions WHERE model_id = ? AND bucket < ?`
	sqlPurgeMark        = `UPDATE models
SET predictions = predictions - ?2,
    labeled = labeled - ?3,
    purged_before = MAX(COALESCE(purged_before, ?4), ?4)
WHERE id = ?1`
)

// Reads. ?4 is the segment or NULL for all segments; zero sums are left out
// because a cell moved away by corrections holds no prediction.
const (
	sqlCells = `SELECT bucket, actual, predicted, SUM(n) FROM cells
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4)
GROUP BY bucket, actual, predicted HAVING SUM(n) <> 0
ORDER BY bucket, actual, predicted`
	sqlPredicted = `SELECT bucket, predicted, SUM(n) FROM predicted_counts
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4)
GROUP BY bucket, predicted HAVING SUM(n) <> 0
ORDER BY bucket, predicted`
	// sqlCellsAsOf ranks each prediction's versions known at ?5: real before
	// implied, then greatest at, then greatest actual; predictions made after
	// ?5 were not known then and are left out.
	sqlCellsAsOf = `WITH p AS (
    SELECT id, bucket, predicted FROM predictions
    WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4) AND at <= ?5
), v AS (
    SELECT v.id, v.actual,
           ROW_NUMBER() OVER (PARTITION BY v.id ORDER BY v.implied, v.at DESC, v.actual DESC) AS rank
    FROM label_versions v JOIN p ON p.id = v.id
    WHERE v.model_id = ?1 AND v.at <= ?5
)
SELECT p.bucket, v.actual, p.predicted, COUNT(*) FROM p JOIN v ON v.id = p.id AND v.rank = 1
GROUP BY p.bucket, v.actual, p.predicted
ORDER BY p.bucket, v.actual, p.predicted`
	sqlPredictedAsOf = `SELECT bucket, predicted, COUNT(*) FROM predictions
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4) AND at <= ?5
GROUP BY bucket, predicted
ORDER BY bucket, predicted`
	// sqlVerifyCells compares maintained cells with cells recounted from
	// raw rows and label history, in buckets whose raw rows are still kept
	// (from the model's purged_before on).
	sqlVerifyCells = `WITH cur AS (
    SELECT model_id, id, actual,
           ROW_NUMBER() OVER (PARTITION BY model_id, id ORDER BY implied, at DESC, actual DESC) AS rank
    FROM label_versions
), re AS (
    SELECT p.model_id, p.bucket, p.segment, c.actual, p.predicted, COUNT(*) AS n
    FROM predictions p JOIN cur c ON c.model_id = p.model_id AND c.id = p.id AND c.rank = 1
    JOIN models m ON m.id = p.model_id
    WHERE m.purged_before IS NULL OR p.bucket >= m.purged_before
    GROUP BY p.model_id, p.bucket, p.segment, c.actual, p.predicted
), st AS (
    SELECT c.model_id, c.bucket, c.segment, c.actual, c.predicted, c.n
    FROM cells c JOIN models m ON m.id = c.model_id
    WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
)
SELECT m.name, d.bucket, d.segment, d.actual, d.predicted, d.stored, d.recounted
FROM (
    SELECT COALESCE(st.model_id, re.model_id) AS model_id, COALESCE(st.bucket, re.bucket) AS bucket,
           COALESCE(st.segment, re.segment) AS segment, COALESCE(st.actual, re.actual) AS actual,
           COALESCE(st.predicted, re.predicted) AS predicted,
           COALESCE(st.n, 0) AS stored, COALESCE(re.n, 0) AS recounted
    FROM st FULL JOIN re ON re.model_id = st.model_id AND re.bucket = st.bucket
        AND re.segment = st.segment AND re.actual = st.actual AND re.predicted = st.predicted
) d JOIN models m ON m.id = d.model_id
WHERE d.stored <> d.recounted
ORDER BY m.name, d.bucket, d.segment, d.actual, d.predicted`
	sqlVerifyPredicted = `WITH re AS (
    SELECT p.model_id, p.bucket, p.segment, p.predicted, COUNT(*) AS n
    FROM predictions p JOIN models m ON m.id = p.model_id
    WHERE m.purged_before IS NULL OR p.bucket >= m.purged_before
    GROUP BY p.model_id, p.bucket, p.segment, p.predicted
), st AS (
    SELECT c.model_id, c.bucket, c.segment, c.predicted, c.n
    FROM predicted_counts c JOIN models m ON m.id = c.model_id
    WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
)
SELECT m.name, d.bucket, d.segment, d.predicted, d.stored, d.recounted
FROM (
    SELECT COALESCE(st.model_id, re.model_id) AS model_id, COALESCE(st.bucket, re.bucket) AS bucket,
           COALESCE(st.segment, re.segment) AS segment, COALESCE(st.predicted, re.predicted) AS predicted,
           COALESCE(st.n, 0) AS stored, COALESCE(re.n, 0) AS recounted
    FROM st FULL JOIN re ON re.model_id = st.model_id AND re.bucket = st.bucket
        AND re.segment = st.segment AND re.predicted = st.predicted
) d JOIN models m ON m.id = d.model_id
WHERE d.stored <> d.recounted
ORDER BY m.name, d.bucket, d.segment, d.predicted`
)

// Score aggregate reads, with the arguments of the count reads. Verify
// reads the raw rows and the maintained rows of every kept bucket, and
// recomputes in Go, with the arithmetic that maintains them.
const (
	sqlScored = `SELECT bucket, SUM(scored) FROM predicted_counts
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4)
GROUP BY bucket HAVING SUM(scored) <> 0`
	sqlScoreCounts = `SELECT bucket, class, bin, SUM(n) FROM score_counts
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4)
GROUP BY bucket, class, bin HAVING SUM(n) <> 0`
	sqlScoreLabels = `SELECT bucket, bin, SUM(n), SUM(score_sum), SUM(correct), SUM(brier_sum) FROM score_labels
WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4)
GROUP BY bucket, bin ORDER BY bucket, bin`
	// sqlScoresAsOf lists the scored predictions made by ?5 with their
	// label as of ?5 (ranked as in sqlCellsAsOf), NULL if none.
	sqlScoresAsOf = `WITH p AS (
    SELECT id, bucket, predicted, scores FROM predictions
    WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND (?4 IS NULL OR segment = ?4) AND at <= ?5
      AND scores IS NOT NULL
), v AS (
    SELECT v.id, v.actual,
           ROW_NUMBER() OVER (PARTITION BY v.id ORDER BY v.implied, v.at DESC, v.actual DESC) AS rank
    FROM label_versions v JOIN p ON p.id = v.id
    WHERE v.model_id = ?1 AND v.at <= ?5
)
SELECT p.bucket, p.predicted, p.scores, v.actual FROM p LEFT JOIN v ON v.id = p.id AND v.rank = 1`
	sqlVerifyScoresRaw = `WITH cur AS (
    SELECT model_id, id, actual,
           ROW_NUMBER() OVER (PARTITION BY model_id, id ORDER BY implied, at DESC, actual DESC) AS rank
    FROM label_versions
)
SELECT m.name, p.segment, p.bucket, p.predicted, p.scores, c.actual
FROM predictions p JOIN models m ON m.id = p.model_id
LEFT JOIN cur c ON c.model_id = p.model_id AND c.id = p.id AND c.rank = 1
WHERE p.scores IS NOT NULL AND (m.purged_before IS NULL OR p.bucket >= m.purged_before)`
	sqlVerifyScored = `SELECT m.name, c.segment, c.bucket, SUM(c.scored)
FROM predicted_counts c JOIN models m ON m.id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
GROUP BY m.name, c.segment, c.bucket`
	sqlVerifyScoreCounts = `SELECT m.name, c.segment, c.bucket, c.class, c.bin, c.n
FROM score_counts c JOIN models m ON m.id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before`
	sqlVerifyScoreLabels = `SELECT m.name, c.segment, c.bucket, c.bin, c.n, c.score_sum, c.correct, c.brier_sum
FROM score_labels c JOIN models m ON m.id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before`
)

// Alerts.
const (
	sqlUpsertAlert = `INSERT INTO alerts (key, rule, model, class, state, data, updated_at)
VALUES (?, ?, ?, ?, ?, ?, ?)
ON CONFLICT (key) DO UPDATE SET rule = excluded.rule, model = excluded.model, class = excluded.class,
    state = excluded.state, data = excluded.data, updated_at = excluded.updated_at`
	sqlInsertAlertHistory = `INSERT INTO alert_history (key, rule, model, class, state, data, updated_at)
VALUES (?, ?, ?, ?, ?, ?, ?)`
	sqlAlerts       = `SELECT key, rule, model, class, state, data, updated_at FROM alerts ORDER BY key`
	sqlAlertHistory = `SELECT key, rule, model, class, state, data, updated_at FROM alert_history
WHERE updated_at >= ? AND updated_at < ?
ORDER BY updated_at DESC, seq DESC
LIMIT ?`
)
