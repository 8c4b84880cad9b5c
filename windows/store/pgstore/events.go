package pgstore

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlEvents lists q's events in time order ($1 model, $2 and $3 the bucket
// range, $4 until, $5 whether to send scores). v keeps the implied version
// only when no real version is at least as old (the real one wins from
// its at on); s puts each prediction's remaining versions in the order they
// become current, (at, actual), and pairs each with the one before it;
// versions that keep the class make no event. A version's event comes at
// the later of its at and its prediction's.
const sqlEvents = `WITH p AS (
    SELECT pkey, bucket, at, segment, predicted, scores FROM predictions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
), v AS (
    SELECT pkey, at, implied, actual,
           min(CASE WHEN NOT implied THEN at END) OVER (PARTITION BY pkey) AS first_real
    FROM label_versions WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at < $4
), s AS (
    SELECT pkey, at, implied, actual, lag(actual) OVER (PARTITION BY pkey ORDER BY at, actual) AS old
    FROM v WHERE NOT implied OR first_real IS NULL OR first_real > at
)
SELECT 0 AS kind, p.at AS t, p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN $5 THEN p.scores END, NULL::text, NULL::text, false
FROM p
UNION ALL
SELECT 1, greatest(s.at, p.at), p.at, p.bucket, p.segment, p.predicted,
       CASE WHEN $5 THEN p.scores END, s.old, s.actual, s.implied
FROM s JOIN p ON p.pkey = s.pkey
WHERE greatest(s.at, p.at) < $4 AND s.old IS DISTINCT FROM s.actual
ORDER BY t, kind`

// Events streams q's events in time order from one query, row by row; see
// store.Store. It fails with store.ErrPurged when q.From lies before the
// model's purge cutoff.
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
	rows, err := s.pool.Query(ctx, sqlEvents, id, micro(q.From), micro(q.To), micro(q.Until), q.Scores)
	if err != nil {
		return unavailable("read events", err)
	}
	defer rows.Close()
	var (
		ev          store.Event
		kind        int32
		scores      []byte
		old, actual *string
	)
	dest := []any{&kind, &ev.At, &ev.PredictionAt, &ev.Bucket, &ev.Segment, &ev.Predicted, &scores, &old, &actual, &ev.Implied}
	for rows.Next() {
		if err := rows.Scan(dest...); err != nil {
			return unavailable("read event", err)
		}
		ev.Kind = store.EventKind(kind)
		ev.At, ev.PredictionAt, ev.Bucket = ev.At.UTC(), ev.PredictionAt.UTC(), ev.Bucket.UTC()
		ev.Old, ev.Actual, ev.Scores = deref(old), deref(actual), nil
		if len(scores) > 0 {
			if err := json.Unmarshal(scores, &ev.Scores); err != nil {
				return fmt.Errorf("decode scores: %w", err)
			}
		}
		if err := fn(&ev); err != nil {
			return err
		}
	}
	if err := rows.Err(); err != nil && !errors.Is(err, pgx.ErrNoRows) {
		return unavailable("read events", err)
	}
	return nil
}

func deref(s *string) string {
	if s == nil {
		return ""
	}
	return *s
}
