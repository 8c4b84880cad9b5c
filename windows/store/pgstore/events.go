package pgstore

import (
	"context"
	"encoding/json"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// Events reads two streams, each sorted by the database on a connection
// of its own (so the two sorts run in parallel) from one exported
// snapshot: predictions by at, and label changes by the time they took
// effect. The merge puts a prediction before a label change of the same
// time.
const (
	// sqlEventPredictions lists q's predictions by at ($1 model, $2 and
	// $3 the bucket range, $4 until, $5 whether to send scores).
	sqlEventPredictions = `SELECT at, bucket, segment, predicted, CASE WHEN $5 THEN scores END
FROM predictions
WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
ORDER BY at`
	// sqlEventLabels lists q's label changes by the time they took effect.
	// v keeps the implied version only when no real version is at least
	// as old (the real one wins from its at on); s puts each prediction's
	// remaining versions in the order they become current, (at, actual),
	// and pairs each with the one before it; versions that keep the class
	// make no event. A version takes effect at the later of its at and its
	// prediction's.
	sqlEventLabels = `WITH v AS (
    SELECT pkey, at, implied, actual,
           min(CASE WHEN NOT implied THEN at END) OVER (PARTITION BY pkey) AS first_real
    FROM label_versions WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
), s AS (
    SELECT pkey, at, implied, actual, lag(actual) OVER (PARTITION BY pkey ORDER BY at, actual) AS old
    FROM v WHERE NOT implied OR first_real IS NULL OR first_real > at
), p AS (
    SELECT pkey, at, bucket, segment, predicted, scores FROM predictions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
)
SELECT greatest(s.at, p.at) AS t, p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN $5 THEN p.scores END, s.old, s.actual, s.implied
FROM s JOIN p ON p.pkey = s.pkey
WHERE greatest(s.at, p.at) < $4 AND s.old IS DISTINCT FROM s.actual
ORDER BY t`
	sqlExportSnapshot = `SELECT pg_export_snapshot()`
	// sqlEventWorkMem lets each stream sort in memory up to this size
	// before it spills to disk.
	sqlEventWorkMem = `SET LOCAL work_mem = '128MB'`
	// sqlEventNoNestLoop keeps the planner from joining label versions to
	// predictions row by row, which it picks when a bulk load has not
	// been analyzed yet and which then costs versions × predictions.
	sqlEventNoNestLoop = `SET LOCAL enable_nestloop = off`
)

// eventChunk is how many events a stream hands to the merge at a time.
const eventChunk = 2048

// Events streams q's events in time order; see store.Store. It fails with
// store.ErrPurged when q.From lies before the model's purge cutoff.
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
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	opts := pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly}
	first, err := s.pool.BeginTx(ctx, opts)
	if err != nil {
		return unavailable("begin events read", err)
	}
	defer first.Rollback(context.WithoutCancel(ctx))
	second, err := s.pool.BeginTx(ctx, opts)
	if err != nil {
		return unavailable("begin events read", err)
	}
	defer second.Rollback(context.WithoutCancel(ctx))
	var snapshot string
	if err := first.QueryRow(ctx, sqlExportSnapshot).Scan(&snapshot); err != nil {
		return unavailable("export snapshot", err)
	}
	if _, err := second.Exec(ctx, "SET TRANSACTION SNAPSHOT "+quoteLiteral(snapshot)); err != nil {
		return unavailable("share snapshot", err)
	}
	args := []any{id, micro(q.From), micro(q.To), micro(q.Until), q.Scores}
	preds := streamEvents(ctx, first, sqlEventPredictions, args, scanPrediction)
	labels := streamEvents(ctx, second, sqlEventLabels, args, scanLabel)
	err = mergeEvents(preds, labels, fn)
	// The streams' goroutines use the transactions: they end before the
	// deferred rollbacks run.
	cancel()
	preds.stop()
	labels.stop()
	return err
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

// eventStream yields chunks of events read on its own goroutine.
type eventStream struct {
	ch   chan []store.Event
	errc chan error
	buf  []store.Event
	done bool
}

func streamEvents(ctx context.Context, tx pgx.Tx, sql string, args []any, scan func(pgx.Rows, *store.Event, *[]byte) error) *eventStream {
	es := &eventStream{ch: make(chan []store.Event, 2), errc: make(chan error, 1)}
	go func() {
		defer close(es.ch)
		es.errc <- func() error {
			for _, set := range []string{sqlEventWorkMem, sqlEventNoNestLoop} {
				if _, err := tx.Exec(ctx, set); err != nil {
					return unavailable("set read options", err)
				}
			}
			rows, err := tx.Query(ctx, sql, args...)
			if err != nil {
				return unavailable("read events", err)
			}
			defer rows.Close()
			chunk := make([]store.Event, 0, eventChunk)
			var scores []byte
			for rows.Next() {
				chunk = append(chunk, store.Event{})
				e := &chunk[len(chunk)-1]
				if err := scan(rows, e, &scores); err != nil {
					return err
				}
				if len(chunk) == eventChunk {
					select {
					case es.ch <- chunk:
					case <-ctx.Done():
						return ctx.Err()
					}
					chunk = make([]store.Event, 0, eventChunk)
				}
			}
			if err := rows.Err(); err != nil {
				return unavailable("read events", err)
			}
			if len(chunk) > 0 {
				select {
				case es.ch <- chunk:
				case <-ctx.Done():
					return ctx.Err()
				}
			}
			return nil
		}()
	}()
	return es
}

// peek returns the stream's next event, nil at its end.
func (es *eventStream) peek() (*store.Event, error) {
	for len(es.buf) == 0 {
		if es.done {
			return nil, nil
		}
		chunk, ok := <-es.ch
		if !ok {
			es.done = true
			return nil, <-es.errc
		}
		es.buf = chunk
	}
	return &es.buf[0], nil
}

// stop waits for the stream's goroutine to end, dropping what it held.
func (es *eventStream) stop() {
	for range es.ch {
	}
	if !es.done {
		es.done = true
		<-es.errc
	}
}

// mergeEvents calls fn for the events of both streams in time order, a
// prediction first on equal times.
func mergeEvents(preds, labels *eventStream, fn func(*store.Event) error) error {
	for {
		p, err := preds.peek()
		if err != nil {
			return err
		}
		l, err := labels.peek()
		if err != nil {
			return err
		}
		var e *store.Event
		switch {
		case p == nil && l == nil:
			return nil
		case l == nil || (p != nil && !l.At.Before(p.At)):
			e = p
			preds.buf = preds.buf[1:]
		default:
			e = l
			labels.buf = labels.buf[1:]
		}
		if err := fn(e); err != nil {
			return err
		}
	}
}

func scanPrediction(rows pgx.Rows, e *store.Event, scores *[]byte) error {
	if err := rows.Scan(&e.At, &e.Bucket, &e.Segment, &e.Predicted, scores); err != nil {
		return unavailable("read event", err)
	}
	e.Kind, e.At, e.Bucket = store.EventPrediction, e.At.UTC(), e.Bucket.UTC()
	e.PredictionAt = e.At
	return decodeScores(*scores, e)
}

func scanLabel(rows pgx.Rows, e *store.Event, scores *[]byte) error {
	var old *string
	if err := rows.Scan(&e.At, &e.PredictionAt, &e.Bucket, &e.Segment, &e.Predicted, scores, &old, &e.Actual, &e.Implied); err != nil {
		return unavailable("read event", err)
	}
	e.Kind, e.At, e.PredictionAt, e.Bucket = store.EventLabel, e.At.UTC(), e.PredictionAt.UTC(), e.Bucket.UTC()
	if old != nil {
		e.Old = *old
	}
	return decodeScores(*scores, e)
}

func decodeScores(b []byte, e *store.Event) error {
	if len(b) == 0 {
		return nil
	}
	if err := json.Unmarshal(b, &e.Scores); err != nil {
		return fmt.Errorf("decode scores: %w", err)
	}
	return nil
}
