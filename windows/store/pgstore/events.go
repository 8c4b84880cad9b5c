package pgstore

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// Events reads streams from one exported snapshot, each on a connection
// of its own so that the server works on them at once: predictions by at
// (or grouped by step, see store.EventQuery.Step), and the label changes
// of each day's predictions by the time they took effect, one cursor per
// day of label_versions, the days dealt to labelStreams connections (see
// labelDays). Sorting a day at a time keeps each sort small, and a day's
// cursor is opened only when its stream reaches the day's start: no event
// of a day's predictions comes before it, since a prediction's bucket
// starts at or before its at.
const (
	// sqlEventPredictions lists q's predictions by at ($1 model, $2 and
	// $3 the bucket range, $4 until, $5 whether to send scores).
	sqlEventPredictions = `SELECT at, at, bucket, segment, predicted, CASE WHEN $5 THEN scores END, 1::bigint
FROM predictions
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
ORDER BY at`
	// sqlEventPredictionGroups lists q's predictions grouped by step ($5,
	// in microseconds): the end of the step that holds at, the latest at,
	// the group and its count.
	sqlEventPredictionGroups = `SELECT date_bin($5 * interval '1 microsecond', at - interval '1 microsecond', timestamptz 'epoch')
         + $5 * interval '1 microsecond' AS g,
       max(at), bucket, segment, predicted, NULL::jsonb, count(*)
FROM predictions
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
GROUP BY 1, bucket, segment, predicted
ORDER BY 1`
	// sqlEventLabelsDay lists the label changes of the predictions whose
	// bucket lies in [$2, $3), one day at most, by the time they took
	// effect. v holds the day's versions. A prediction with one version
	// (none numbered above 1, see versionRows) changes once, from no
	// label; for the others, w keeps the implied version only when no
	// real version is at least as old (the real one wins from its at on),
	// and the window puts the remaining versions in the order they become
	// current, (at, actual), pairing each with the one before it. Versions
	// that keep the class make no event. A version takes effect at the
	// later of its at and its prediction's. The day's predictions are read
	// through the bucket index: "model_id + 0" keeps the planner off the
	// primary key, which it would pick for a model's rows (all days) when
	// a bulk load has not been analyzed yet, and sqlEventNoSeqScan off a
	// scan of the whole table.
	sqlEventLabelsDay = `WITH v AS MATERIALIZED (
    SELECT pkey, seq, at, implied, actual FROM label_versions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
), m AS (
    SELECT DISTINCT pkey FROM v WHERE seq > 1
), w AS (
    SELECT pkey, at, implied, actual,
           min(CASE WHEN NOT implied THEN at END) OVER (PARTITION BY pkey) AS first_real
    FROM v WHERE pkey IN (SELECT pkey FROM m)
), s AS (
    SELECT pkey, at, implied, actual, NULL::text AS old FROM v
    WHERE NOT EXISTS (SELECT 1 FROM m WHERE m.pkey = v.pkey)
    UNION ALL
    SELECT pkey, at, implied, actual, lag(actual) OVER (PARTITION BY pkey ORDER BY at, actual)
    FROM w WHERE NOT implied OR first_real IS NULL OR first_real > at
), p AS (
    SELECT pkey, at, bucket, segment, predicted, scores FROM predictions
    WHERE model_id + 0 = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
)
SELECT greatest(s.at, p.at) AS t, p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN $5 THEN p.scores END, s.old, s.actual, s.implied
FROM s JOIN p ON p.pkey = s.pkey
WHERE greatest(s.at, p.at) < $4 AND s.old IS DISTINCT FROM s.actual
ORDER BY t`
	// sqlEventDays lists the model's days with raw rows in [$2, $3).
	sqlEventDays      = `SELECT day FROM raw_partitions WHERE model_id = $1 AND day >= $2 AND day < $3 ORDER BY day`
	sqlExportSnapshot = `SELECT pg_export_snapshot()`
	// sqlEventWorkMem lets each sort and hash work in memory up to this
	// size before it spills to disk.
	sqlEventWorkMem = `SET LOCAL work_mem = '128MB'`
	// sqlEventNoNestLoop keeps the planner from joining label versions to
	// predictions row by row, which it picks when a bulk load has not
	// been analyzed yet and which then costs versions × predictions.
	sqlEventNoNestLoop = `SET LOCAL enable_nestloop = off`
	// sqlEventNoSeqScan keeps the label streams' day queries on the
	// indexes whatever the statistics say.
	sqlEventNoSeqScan = `SET LOCAL enable_seqscan = off`
)

// eventChunk is how many events a stream reads at a time.
const eventChunk = 2048

// Events streams q's events in time order; see store.Store. It fails with
// store.ErrPurged when q.From lies before the model's purge cutoff. It
// groups prediction events when q.Step is positive and q.Scores unset.
func (s *Store) Events(ctx context.Context, q store.EventQuery, fn func(*store.Event) error) error {
	id, err := s.modelID(ctx, q.Model)
	if err != nil {
		return err
	}
	var purged *time.Time
	if err := s.pool.QueryRow(ctx, sqlPurgedBefore, id).Scan(&purged); err != nil {
		return unavailable("read purge cutoff", err)
	}
	if purged != nil && q.From.Before(*purged) {
		return fmt.Errorf("read events of %s from %s: raw rows before %s are gone: %w",
			q.Model, q.From.UTC().Format(time.RFC3339), purged.UTC().Format(time.RFC3339), store.ErrPurged)
	}
	// Each day's prediction lookup goes through the bucket index, whose
	// newest block ranges stay unsummarized (matching every day) until
	// summarized.
	if err := s.summarize(ctx); err != nil {
		return err
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	txs, err := s.sharedSnapshot(ctx, 1+labelStreams)
	if err != nil {
		return err
	}
	for i, tx := range txs {
		defer tx.Rollback(context.WithoutCancel(ctx))
		sets := []string{sqlEventWorkMem, sqlEventNoNestLoop, sqlEventNoSeqScan}
		if i == 0 {
			sets = sets[:2] // predictions: one scan of the whole range
		}
		for _, set := range sets {
			if _, err := tx.Exec(ctx, set); err != nil {
				return unavailable("set read options", err)
			}
		}
	}
	from, to, until := micro(q.From), micro(q.To), micro(q.Until)
	rows, err := txs[0].Query(ctx, sqlEventDays, id, dayOf(from), to)
	if err != nil {
		return unavailable("list event days", err)
	}
	days, err := pgx.CollectRows(rows, pgx.RowTo[time.Time])
	if err != nil {
		return unavailable("list event days", err)
	}
	sql, args := sqlEventPredictions, []any{id, from, to, until, q.Scores}
	if q.Step > 0 && !q.Scores {
		sql, args = sqlEventPredictionGroups, []any{id, from, to, until, q.Step.Microseconds()}
	}
	streams := []*eventStream{streamPredictions(ctx, txs[0], sql, args)}
	for i, tx := range txs[1:] {
		ld := &labelDays{tx: tx, args: func(lo, hi time.Time) []any { return []any{id, lo, hi, until, q.Scores} }, from: from, to: to}
		for j := i; j < len(days); j += labelStreams {
			ld.days = append(ld.days, days[j])
		}
		streams = append(streams, streamLabels(ctx, ld))
	}
	err = mergeEvents(streams, fn)
	// The streams' goroutines use the transactions: they end before the
	// deferred rollbacks run.
	cancel()
	for _, es := range streams {
		es.stop()
	}
	return err
}

// labelStreams is how many connections read label events side by side,
// each the days of its turn (day i goes to stream i mod labelStreams).
const labelStreams = 2

// sharedSnapshot begins n read-only transactions that see one snapshot.
func (s *Store) sharedSnapshot(ctx context.Context, n int) ([]pgx.Tx, error) {
	opts := pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly}
	txs := make([]pgx.Tx, 0, n)
	fail := func(what string, err error) ([]pgx.Tx, error) {
		for _, tx := range txs {
			tx.Rollback(context.WithoutCancel(ctx))
		}
		return nil, unavailable(what, err)
	}
	var snapshot string
	for i := range n {
		tx, err := s.pool.BeginTx(ctx, opts)
		if err != nil {
			return fail("begin events read", err)
		}
		txs = append(txs, tx)
		if i == 0 {
			err = tx.QueryRow(ctx, sqlExportSnapshot).Scan(&snapshot)
		} else {
			_, err = tx.Exec(ctx, "SET TRANSACTION SNAPSHOT "+quoteLiteral(snapshot))
		}
		if err != nil {
			return fail("share snapshot", err)
		}
	}
	return txs, nil
}

// quoteLiteral quotes a snapshot id (hex digits and dashes) as an SQL
// string; SET TRANSACTION SNAPSHOT takes no parameter.
func quoteLiteral(s string) string {
	out := []byte{'\''}
	for i := range len(s) {
		if s[i] == '\'' {
			out = append(out, '\'')
		}
		out = append(out, s[i])
	}
	return string(append(out, '\''))
}

// mergeEvents calls fn for the events of streams in time order; on equal
// times the earlier stream's event comes first (predictions are stream 0).
func mergeEvents(streams []*eventStream, fn func(*store.Event) error) error {
	for {
		var (
			next *eventStream
			e    *store.Event
		)
		for _, es := range streams {
			h, err := es.peek()
			if err != nil {
				return err
			}
			if h != nil && (e == nil || h.At.Before(e.At)) {
				next, e = es, h
			}
		}
		if e == nil {
			return nil
		}
		if err := fn(e); err != nil {
			return err
		}
		next.buf = next.buf[1:]
	}
}

func scanPrediction(rows pgx.Rows, e *store.Event, scores *[]byte) error {
	if err := rows.Scan(&e.At, &e.PredictionAt, &e.Bucket, &e.Segment, &e.Predicted, scores, &e.Count); err != nil {
		return unavailable("read event", err)
	}
	e.Kind, e.At, e.PredictionAt, e.Bucket = store.EventPrediction, e.At.UTC(), e.PredictionAt.UTC(), e.Bucket.UTC()
	return decodeScores(*scores, e)
}

func scanLabel(rows pgx.Rows, e *store.Event, scores *[]byte) error {
	var old *string
	if err := rows.Scan(&e.At, &e.PredictionAt, &e.Bucket, &e.Segment, &e.Predicted, scores, &old, &e.Actual, &e.Implied); err != nil {
		return unavailable("read event", err)
	}
	e.Kind, e.At, e.PredictionAt, e.Bucket, e.Count = store.EventLabel, e.At.UTC(), e.PredictionAt.UTC(), e.Bucket.UTC(), 1
	if old != nil {
		e.Old = *old
	}
	return decodeScores(*scores, e)
}

func decodeScores(b []byte, e *store.Event) error {
	if len(b) == 0 {
		return nil
	}
	var err error
	if e.Scores, err = store.ParseScores(b); err != nil {
		return fmt.Errorf("decode scores: %w", err)
	}
	return nil
}
