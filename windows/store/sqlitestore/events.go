package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlEvents lists q's events in time order (?1 model, ?2 and ?3 the bucket
// range, ?4 until, ?5 whether to send scores). v keeps the implied version
// only when no real version is at least as old (the real one wins from its
// at on); s puts each prediction's remaining versions in the order they
// become current, (at, actual), and pairs each with the one before it;
// versions that keep the class make no event. A version's event comes at
// the later of its at and its prediction's.
const sqlEvents = `WITH p AS MATERIALIZED (
    SELECT id, bucket, at, segment, predicted, scores FROM predictions
    WHERE model_id = ?1 AND bucket >= ?2 AND bucket < ?3 AND at < ?4
), v AS (
    SELECT l.id, l.at, l.implied, l.actual,
           MIN(CASE WHEN l.implied = 0 THEN l.at END) OVER (PARTITION BY l.id) AS first_real
    FROM label_versions l JOIN p ON p.id = l.id
    WHERE l.model_id = ?1 AND l.at < ?4
), s AS (
    SELECT id, at, implied, actual, LAG(actual) OVER (PARTITION BY id ORDER BY at, actual) AS old
    FROM v WHERE implied = 0 OR first_real IS NULL OR first_real > at
)
SELECT 0 AS kind, p.at AS t, p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN ?5 THEN p.scores END, NULL, NULL, 0
FROM p
UNION ALL
SELECT 1, MAX(s.at, p.at), p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN ?5 THEN p.scores END, s.old, s.actual, s.implied
FROM s JOIN p ON p.id = s.id
WHERE MAX(s.at, p.at) < ?4 AND s.old IS NOT s.actual
ORDER BY 2, 1`

// Events streams q's events in time order from one query, row by row; see
// store.Store. It ignores q.Step: each prediction is an event of its own.
// It fails with store.ErrPurged when q.From lies before the model's purge
// cutoff.
func (s *Store) Events(ctx context.Context, q store.EventQuery, fn func(*store.Event) error) error {
	id, err := s.modelID(ctx, s.read, q.Model)
	if err != nil {
		return err
	}
	var purged sql.NullInt64
	if err := s.read.QueryRowContext(ctx, sqlEventsPurgedBefore, id).Scan(&purged); err != nil {
		return unavailable("read purge cutoff", err)
	}
	if purged.Valid && micros(q.From) < purged.Int64 {
		return fmt.Errorf("read events of %s from %s: raw rows before %s are gone: %w",
			q.Model, q.From.UTC().Format(time.RFC3339), fromMicros(purged.Int64).Format(time.RFC3339), store.ErrPurged)
	}
	rows, err := s.read.QueryContext(ctx, sqlEvents, id, micros(q.From), micros(q.To), micros(q.Until), q.Scores)
	if err != nil {
		return unavailable("read events", err)
	}
	defer rows.Close()
	var (
		ev                   store.Event
		kind, t, pat, bucket int64
		scores, old, actual  sql.NullString
	)
	for rows.Next() {
		if err := rows.Scan(&kind, &t, &pat, &bucket, &ev.Segment, &ev.Predicted, &scores, &old, &actual, &ev.Implied); err != nil {
			return unavailable("read event", err)
		}
		ev.Kind, ev.Count = store.EventKind(kind), 1
		ev.At, ev.PredictionAt, ev.Bucket = fromMicros(t), fromMicros(pat), fromMicros(bucket)
		ev.Old, ev.Actual, ev.Scores = old.String, actual.String, nil
		if scores.Valid {
			if ev.Scores, err = store.ParseScores([]byte(scores.String)); err != nil {
				return fmt.Errorf("decode scores: %w", err)
			}
		}
		if err := fn(&ev); err != nil {
			return err
		}
	}
	if err := rows.Err(); err != nil && !errors.Is(err, sql.ErrNoRows) {
		return unavailable("read events", err)
	}
	return nil
}

// sqlEventsPurgedBefore reads a model's purge cutoff (NULL: never purged).
const sqlEventsPurgedBefore = `SELECT purged_before FROM models WHERE id = ?1`
