package pgstore

// Every statement the store runs is one of these constants, except the
// partition DDL of partitions.go, whose table names are dates. Arrays bound
// to unnest carry a batch in one parameter each, so a statement covers a
// whole batch; class and segment names are ordered with to
// match Go's byte order whatever the database's collation.

// Schema versions.
const (
	sqlCreateVersionTable = `CREATE TABLE IF NOT EXISTS schema_version (
    version    integer PRIMARY KEY,
    name       text NOT NULL,
    applied_at timestamptz NOT NULL DEFAULT now()
)`
	sqlSchemaVersion = `SELECT coalesce(max(version), 0) FROM schema_version`
	sqlRecordVersion = `INSERT INTO schema_version (version, name) VALUES ($1, $2)`
)

// Locks. The two-key advisory locks take (kind, model id).
const (
	sqlLockSession     = `SELECT pg_advisory_lock($1, 0)`
	sqlUnlockSession   = `SELECT pg_advisory_unlock($1, 0)`
	sqlLockXact        = `SELECT pg_advisory_xact_lock($1, 0)`
	sqlLockModels      = `SELECT count(pg_advisory_xact_lock($1, m)) FROM unnest($2::int[]) AS m`
	sqlLockModelsShare = `SELECT count(pg_advisory_xact_lock_shared($1, m)) FROM unnest($2::int[]) AS m`
	sqlTryLead         = `SELECT pg_try_advisory_lock($1)`
	sqlUnlockLead      = `SELECT pg_advisory_unlock($1)`
	// sqlLeadHeld checks that this session still holds the one-key lock $1
	// (split by PostgreSQL into classid = high half, objid = low half).
	sqlLeadHeld = `SELECT EXISTS (
    SELECT 1 FROM pg_locks
    WHERE locktype = 'advisory' AND pid = pg_backend_pid() AND granted AND objsubid = 1
      AND classid = (($1::bigint >> 32) & 4294967295)::oid AND objid = ($1::bigint & 4294967295)::oid
)`
)

// Model registry.
const (
	sqlModelIDs    = `SELECT name, model_id FROM models WHERE name = ANY($1::text[])`
	sqlInsertModel = `INSERT INTO models (name) VALUES ($1) ON CONFLICT (name) DO NOTHING`
	sqlLockModel   = `SELECT model_id FROM models WHERE name = $1 FOR UPDATE`
	sqlClasses     = `SELECT name FROM model_classes WHERE model_id = $1 ORDER BY position`
	sqlAddClasses  = `INSERT INTO model_classes (model_id, position, name)
SELECT $1, $2 + u.ord - 1, u.name FROM unnest($3::text[]) WITH ORDINALITY AS u(name, ord)`
	// sqlModels lists models with totals over the raw rows still kept (the
	// counts of buckets from purged_before on) and the latest prediction
	// time ever seen.
	sqlModels = `SELECT m.name, cl.classes, pc.latest, coalesce(pc.n, 0), coalesce(c.n, 0)
FROM models m
LEFT JOIN LATERAL (
    SELECT array_agg(name ORDER BY position) AS classes FROM model_classes WHERE model_id = m.model_id
) cl ON true
LEFT JOIN LATERAL (
    SELECT max(latest_at) AS latest,
           sum(n) FILTER (WHERE m.purged_before IS NULL OR bucket >= m.purged_before)::bigint AS n
    FROM predicted_counts WHERE model_id = m.model_id
) pc ON true
LEFT JOIN LATERAL (
    SELECT sum(n)::bigint AS n FROM cells
    WHERE model_id = m.model_id AND (m.purged_before IS NULL OR bucket >= m.purged_before)
) c ON true
ORDER BY m.name`
)

// Prediction ingest.
const (
	sqlKeyBlocks      = `SELECT nextval('prediction_key_blocks') FROM generate_series(1, $1::int)`
	sqlSavepoint      = `SAVEPOINT copy_predictions`
	sqlRollbackToSave = `ROLLBACK TO SAVEPOINT copy_predictions`
	// sqlStoredContent reads the stored content of the given keys.
	sqlStoredContent = `SELECT u.m, u.id, p.at, p.segment, p.predicted, p.scores::text
FROM unnest($1::int[], $2::text[]) AS u(m, id)
JOIN predictions p ON p.model_id = u.m AND p.id = u.id`
	sqlAddPredicted = `INSERT INTO predicted_counts (model_id, bucket, segment, predicted, n, latest_at, scored)
SELECT * FROM unnest($1::int[], $2::timestamptz[], $3::text[], $4::text[], $5::bigint[], $6::timestamptz[], $7::bigint[])
ON CONFLICT (model_id, bucket, segment, predicted) DO UPDATE
SET n = predicted_counts.n + excluded.n, latest_at = greatest(predicted_counts.latest_at, excluded.latest_at),
    scored = predicted_counts.scored + excluded.scored`
	sqlAddScores = `INSERT INTO score_counts (model_id, bucket, segment, class, bin, n)
SELECT * FROM unnest($1::int[], $2::timestamptz[], $3::text[], $4::text[], $5::smallint[], $6::bigint[])
ON CONFLICT (model_id, bucket, segment, class, bin) DO UPDATE SET n = score_counts.n + excluded.n`
	sqlAddScoreLabels = `INSERT INTO score_labels (model_id, bucket, segment, bin, n, score_sum, correct, brier_sum)
SELECT * FROM unnest($1::int[], $2::timestamptz[], $3::text[], $4::smallint[], $5::bigint[], $6::bigint[], $7::bigint[], $8::bigint[])
ON CONFLICT (model_id, bucket, segment, bin) DO UPDATE
SET n = score_labels.n + excluded.n, score_sum = score_labels.score_sum + excluded.score_sum,
    correct = score_labels.correct + excluded.correct, brier_sum = score_labels.brier_sum + excluded.brier_sum`
	// sqlModelClasses lists the classes of the given models.
	sqlModelClasses = `SELECT model_id, name FROM model_classes WHERE model_id = ANY($1::int[]) ORDER BY model_id, position`
	sqlHasEarly     = `SELECT EXISTS (SELECT 1 FROM early_labels WHERE model_id = ANY($1::int[]))`
	// sqlTakeEarly removes and returns the early labels of new predictions.
	sqlTakeEarly = `DELETE FROM early_labels e
USING unnest($1::int[], $2::text[]) AS u(m, id)
WHERE e.model_id = u.m AND e.id = u.id
RETURNING e.model_id, e.id, e.at, e.actual`
)

// Label ingest.
const (
	// sqlFindPredictions returns the join keys of the known predictions
	// among the given (model, id) pairs.
	sqlFindPredictions = `SELECT u.i, p.pkey, p.bucket, p.segment, p.predicted, p.scores::text
FROM unnest($1::int[], $2::text[]) WITH ORDINALITY AS u(m, id, i)
JOIN predictions p ON p.model_id = u.m AND p.id = u.id`
	// sqlFindVersions returns every label version of the given predictions
	// of one day, [$4, $5): planning prunes label_versions to that day's
	// partition.
	sqlFindVersions = `SELECT u.i, v.seq, v.implied, v.at, v.actual
FROM unnest($1::int[], $2::timestamptz[], $3::bigint[]) WITH ORDINALITY AS u(m, b, k, i)
JOIN label_versions v ON v.model_id = u.m AND v.pkey = u.k AND v.bucket = u.b
WHERE v.bucket >= $4 AND v.bucket < $5`
	// sqlNoHashJoin and sqlNoMergeJoin make the rest of a label transaction plan its joins
	// as nested loops of index probes, one per line, which is right for a
	// batch against a large table whatever the statistics say; on stale
	// statistics the planner may otherwise hash a whole day partition.
	sqlNoHashJoin  = `SET LOCAL enable_hashjoin = off`
	sqlNoMergeJoin = `SET LOCAL enable_mergejoin = off`
	// sqlNoJIT keeps a batch's statements from being compiled: their cost
	// estimates (thousands of index probes) pass jit_above_cost, but each
	// runs once, and compiling takes longer than running it.
	sqlNoJIT = `SET LOCAL jit = off`
	// sqlAddEarly holds early labels and returns the versions that were new.
	sqlAddEarly = `INSERT INTO early_labels (model_id, id, at, actual, received_at)
SELECT u.m, u.id, u.at, u.actual, $5 FROM unnest($1::int[], $2::text[], $3::timestamptz[], $4::text[]) AS u(m, id, at, actual)
ON CONFLICT DO NOTHING
RETURNING model_id, id, at, actual`
	sqlAddCells = `INSERT INTO cells (model_id, bucket, segment, actual, predicted, n)
SELECT * FROM unnest($1::int[], $2::timestamptz[], $3::text[], $4::text[], $5::text[], $6::bigint[])
ON CONFLICT (model_id, bucket, segment, actual, predicted) DO UPDATE SET n = cells.n + excluded.n`
)

// Maintenance.
const (
	sqlPurgedBefore = `SELECT purged_before FROM models WHERE model_id = $1`
	// sqlIncompleteBuckets lists the buckets up to $2, from $3 (the purge
	// cutoff, NULL if none) on, holding more predictions than labeled ones:
	// only there can a prediction lack a label version.
	sqlIncompleteBuckets = `SELECT pc.bucket FROM (
    SELECT bucket, sum(n) AS n FROM predicted_counts
    WHERE model_id = $1 AND bucket <= $2 AND ($3::timestamptz IS NULL OR bucket >= $3) GROUP BY bucket
) pc LEFT JOIN (
    SELECT bucket, sum(n) AS n FROM cells
    WHERE model_id = $1 AND bucket <= $2 AND ($3::timestamptz IS NULL OR bucket >= $3) GROUP BY bucket
) c USING (bucket)
WHERE pc.n > coalesce(c.n, 0)
ORDER BY pc.bucket`
	// sqlApplyTimeout gives the due predictions of buckets $2 (within
	// [$3, $4]) with no label version an implied one, at at + $6, and
	// returns how many per cell, and the scores of those with scores.
	sqlApplyTimeout = `WITH due AS (
    SELECT p.bucket, p.pkey, p.segment, p.predicted, p.at, p.scores FROM predictions p
    WHERE p.model_id = $1 AND p.bucket = ANY($2::timestamptz[]) AND p.bucket >= $3 AND p.bucket <= $4
      AND p.at <= $5
      AND NOT EXISTS (
          SELECT 1 FROM label_versions v
          WHERE v.model_id = $1 AND v.pkey = p.pkey AND v.bucket = p.bucket AND v.bucket >= $3 AND v.bucket <= $4)
), ins AS (
    INSERT INTO label_versions (model_id, bucket, pkey, seq, implied, at, actual)
    SELECT $1, bucket, pkey, 1, true, at + $6::interval, $7::text FROM due
)
SELECT bucket, segment, predicted, count(*), NULL FROM due WHERE scores IS NULL GROUP BY bucket, segment, predicted
UNION ALL
SELECT bucket, segment, predicted, 1, scores::text FROM due WHERE scores IS NOT NULL`
	sqlExpireEarly = `DELETE FROM early_labels WHERE model_id = $1 AND received_at <= $2`
	sqlSummarize   = `SELECT brin_summarize_new_values('predictions_bucket')`
)

// Purge.
const (
	sqlMarkPurged = `UPDATE models SET purged_before = greatest(coalesce(purged_before, $2), $2) WHERE model_id = $1`
	sqlPurgePreds = `DELETE FROM predictions WHERE model_id = $1 AND bucket < $2`
	// sqlPurgeDays lists the model's days before the cutoff: whether the
	// cutoff passes the whole day, and whether another model still keeps
	// rows there (so the day's partitions cannot be dropped).
	sqlPurgeDays = `SELECT r.day, r.day + interval '1 day' <= $2 AS whole, EXISTS (
    SELECT 1 FROM raw_partitions o JOIN models m ON m.model_id = o.model_id
    WHERE o.day = r.day AND o.model_id <> r.model_id
      AND (m.purged_before IS NULL OR m.purged_before < r.day + interval '1 day')
) AS shared
FROM raw_partitions r WHERE r.model_id = $1 AND r.day < $2`
	sqlForgetDay = `DELETE FROM raw_partitions WHERE model_id = $1 AND day = $2`
	// sqlDroppableDays lists days whose every model has purged past the day.
	sqlDroppableDays = `SELECT r.day FROM raw_partitions r JOIN models m ON m.model_id = r.model_id
GROUP BY r.day
HAVING bool_and(m.purged_before IS NOT NULL AND m.purged_before >= r.day + interval '1 day')
ORDER BY r.day LIMIT $1`
	sqlForgetDayAll = `DELETE FROM raw_partitions WHERE day = $1`
	sqlMissingRel   = `SELECT n FROM unnest($1::text[]) AS n WHERE to_regclass(quote_ident(n)) IS NULL`
	sqlAddDays      = `INSERT INTO raw_partitions (model_id, day)
SELECT * FROM unnest($1::int[], $2::timestamptz[]) ON CONFLICT DO NOTHING`
)

// Reads. $4 is the segment, or NULL for every segment; sums that cancel to
// zero are left out, because a cell emptied by corrections holds nothing.
const (
	sqlCells = `SELECT bucket, actual, predicted, sum(n)::bigint FROM cells
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4)
GROUP BY bucket, actual, predicted HAVING sum(n) <> 0
ORDER BY bucket, actual, predicted`
	sqlPredicted = `SELECT bucket, predicted, sum(n)::bigint FROM predicted_counts
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4)
GROUP BY bucket, predicted HAVING sum(n) <> 0
ORDER BY bucket, predicted`
	// sqlCellsAsOf ranks each prediction's versions known at $5: real
	// before implied, then greatest at, then greatest actual. Predictions
	// made after $5 were not known then and are left out.
	sqlCellsAsOf = `WITH p AS (
    SELECT bucket, pkey, predicted FROM predictions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4) AND at <= $5
), v AS (
    SELECT DISTINCT ON (bucket, pkey) bucket, pkey, actual FROM label_versions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at <= $5
    ORDER BY bucket, pkey, implied, at DESC, actual DESC
)
SELECT p.bucket, v.actual, p.predicted, count(*) FROM p JOIN v ON v.bucket = p.bucket AND v.pkey = p.pkey
GROUP BY p.bucket, v.actual, p.predicted
ORDER BY p.bucket, v.actual, p.predicted`
	sqlPredictedAsOf = `SELECT bucket, predicted, count(*) FROM predictions
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4) AND at <= $5
GROUP BY bucket, predicted
ORDER BY bucket, predicted`
	// sqlVerifyCells compares maintained cells with cells recounted from
	// the raw rows and the label history, in the buckets whose raw rows are
	// still kept (from the model's purged_before on).
	sqlVerifyCells = `WITH cur AS (
    SELECT DISTINCT ON (model_id, bucket, pkey) model_id, bucket, pkey, actual FROM label_versions
    ORDER BY model_id, bucket, pkey, implied, at DESC, actual DESC
), re AS (
    SELECT p.model_id, p.bucket, p.segment, c.actual, p.predicted, count(*) AS n
    FROM predictions p
    JOIN cur c ON c.model_id = p.model_id AND c.bucket = p.bucket AND c.pkey = p.pkey
    JOIN models m ON m.model_id = p.model_id
    WHERE m.purged_before IS NULL OR p.bucket >= m.purged_before
    GROUP BY p.model_id, p.bucket, p.segment, c.actual, p.predicted
), st AS (
    SELECT c.model_id, c.bucket, c.segment, c.actual, c.predicted, c.n
    FROM cells c JOIN models m ON m.model_id = c.model_id
    WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
)
SELECT m.name, d.bucket, d.segment, d.actual, d.predicted, d.stored, d.recounted
FROM (
    SELECT coalesce(st.model_id, re.model_id) AS model_id, coalesce(st.bucket, re.bucket) AS bucket,
           coalesce(st.segment, re.segment) AS segment, coalesce(st.actual, re.actual) AS actual,
           coalesce(st.predicted, re.predicted) AS predicted,
           coalesce(st.n, 0) AS stored, coalesce(re.n, 0) AS recounted
    FROM st FULL JOIN re ON re.model_id = st.model_id AND re.bucket = st.bucket
        AND re.segment = st.segment AND re.actual = st.actual AND re.predicted = st.predicted
) d JOIN models m ON m.model_id = d.model_id
WHERE d.stored <> d.recounted
ORDER BY m.name, d.bucket, d.segment, d.actual, d.predicted`
	sqlVerifyPredicted = `WITH re AS (
    SELECT p.model_id, p.bucket, p.segment, p.predicted, count(*) AS n
    FROM predictions p JOIN models m ON m.model_id = p.model_id
    WHERE m.purged_before IS NULL OR p.bucket >= m.purged_before
    GROUP BY p.model_id, p.bucket, p.segment, p.predicted
), st AS (
    SELECT c.model_id, c.bucket, c.segment, c.predicted, c.n
    FROM predicted_counts c JOIN models m ON m.model_id = c.model_id
    WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
)
SELECT m.name, d.bucket, d.segment, d.predicted, d.stored, d.recounted
FROM (
    SELECT coalesce(st.model_id, re.model_id) AS model_id, coalesce(st.bucket, re.bucket) AS bucket,
           coalesce(st.segment, re.segment) AS segment, coalesce(st.predicted, re.predicted) AS predicted,
           coalesce(st.n, 0) AS stored, coalesce(re.n, 0) AS recounted
    FROM st FULL JOIN re ON re.model_id = st.model_id AND re.bucket = st.bucket
        AND re.segment = st.segment AND re.predicted = st.predicted
) d JOIN models m ON m.model_id = d.model_id
WHERE d.stored <> d.recounted
ORDER BY m.name, d.bucket, d.segment, d.predicted`
)

// Score aggregate reads, with the arguments of the count reads. Verify
// reads the raw rows and the maintained rows of every kept bucket, and
// recomputes in Go, with the arithmetic that maintains them.
const (
	sqlScored = `SELECT bucket, sum(scored)::bigint FROM predicted_counts
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4)
GROUP BY bucket HAVING sum(scored) <> 0`
	sqlScoreCounts = `SELECT bucket, class, bin, sum(n)::bigint FROM score_counts
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4)
GROUP BY bucket, class, bin HAVING sum(n) <> 0`
	sqlScoreLabels = `SELECT bucket, bin, sum(n)::bigint, sum(score_sum)::bigint, sum(correct)::bigint, sum(brier_sum)::bigint
FROM score_labels
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4)
GROUP BY bucket, bin ORDER BY bucket, bin`
	// sqlScoresAsOf lists the scored predictions made by $5 with their
	// label as of $5 (ranked as in sqlCellsAsOf), NULL if none.
	sqlScoresAsOf = `WITH p AS (
    SELECT bucket, pkey, predicted, scores FROM predictions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4) AND at <= $5
      AND scores IS NOT NULL
), v AS (
    SELECT DISTINCT ON (bucket, pkey) bucket, pkey, actual FROM label_versions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at <= $5
    ORDER BY bucket, pkey, implied, at DESC, actual DESC
)
SELECT p.bucket, p.predicted, p.scores::text, v.actual FROM p LEFT JOIN v ON v.bucket = p.bucket AND v.pkey = p.pkey`
	sqlVerifyScoresRaw = `WITH cur AS (
    SELECT DISTINCT ON (model_id, bucket, pkey) model_id, bucket, pkey, actual FROM label_versions
    ORDER BY model_id, bucket, pkey, implied, at DESC, actual DESC
)
SELECT m.name, p.segment, p.bucket, p.predicted, p.scores::text, c.actual
FROM predictions p JOIN models m ON m.model_id = p.model_id
LEFT JOIN cur c ON c.model_id = p.model_id AND c.bucket = p.bucket AND c.pkey = p.pkey
WHERE p.scores IS NOT NULL AND (m.purged_before IS NULL OR p.bucket >= m.purged_before)`
	sqlVerifyScored = `SELECT m.name, c.segment, c.bucket, sum(c.scored)::bigint
FROM predicted_counts c JOIN models m ON m.model_id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before
GROUP BY m.name, c.segment, c.bucket`
	sqlVerifyScoreCounts = `SELECT m.name, c.segment, c.bucket, c.class, c.bin, c.n
FROM score_counts c JOIN models m ON m.model_id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before`
	sqlVerifyScoreLabels = `SELECT m.name, c.segment, c.bucket, c.bin, c.n, c.score_sum, c.correct, c.brier_sum
FROM score_labels c JOIN models m ON m.model_id = c.model_id
WHERE m.purged_before IS NULL OR c.bucket >= m.purged_before`
)

// Alerts.
const (
	sqlUpsertAlert = `INSERT INTO alerts (key, rule, model, class, state, data, updated_at)
VALUES ($1, $2, $3, $4, $5, $6, $7)
ON CONFLICT (key) DO UPDATE SET rule = excluded.rule, model = excluded.model, class = excluded.class,
    state = excluded.state, data = excluded.data, updated_at = excluded.updated_at`
	sqlInsertAlertHistory = `INSERT INTO alert_history (key, rule, model, class, state, data, updated_at)
VALUES ($1, $2, $3, $4, $5, $6, $7)`
	sqlAlerts       = `SELECT key, rule, model, class, state, data, updated_at FROM alerts ORDER BY key`
	sqlAlertHistory = `SELECT key, rule, model, class, state, data, updated_at FROM alert_history
WHERE updated_at >= $1 AND updated_at < $2
ORDER BY updated_at DESC, seq DESC
LIMIT $3`
)
