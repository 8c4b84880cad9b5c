package sqlitestore

import (
	"context"
	"database/sql"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlLabelDelays lists, per prediction of ?1 in [?2, ?3) (segment ?4) made
// by ?5, the microseconds from its at to its first real label version
// known at ?5.
const sqlLabelDelays = `SELECT MIN(v.at) - p.at
FROM predictions p JOIN label_versions v ON v.model_id = p.model_id AND v.id = p.id
WHERE p.model_id = ?1 AND p.bucket >= ?2 AND p.bucket < ?3 AND (?4 IS NULL OR p.segment = ?4) AND p.at <= ?5
  AND v.implied = 0 AND v.at <= ?5
GROUP BY p.id`

// sqlLatestLabels finds each model's latest real label version.
const sqlLatestLabels = `SELECT m.name, MAX(v.at) FROM label_versions v JOIN models m ON m.id = v.model_id
WHERE v.implied = 0 GROUP BY m.name`

// LabelDelays bins the label delays of q's predictions as known at asOf.
func (s *Store) LabelDelays(ctx context.Context, q store.Query, asOf time.Time, edges []time.Duration) ([]int64, error) {
	id, err := s.modelID(ctx, s.read, q.Model)
	if err != nil {
		return nil, err
	}
	out := make([]int64, len(edges)+1)
	args := []any{id, micros(q.From), micros(q.To), segmentArg(q.Segment), micros(asOf)}
	err = each(ctx, s.read, sqlLabelDelays, args, func(r *sql.Rows) error {
		var delay int64
		if err := r.Scan(&delay); err != nil {
			return err
		}
		d := time.Duration(delay) * time.Microsecond
		// The bin is the number of edges at or below d.
		bin, _ := slices.BinarySearchFunc(edges, d, func(e, d time.Duration) int {
			if e <= d {
				return -1
			}
			return 1
		})
		out[bin]++
		return nil
	})
	if err != nil {
		return nil, unavailable("read label delays", err)
	}
	return out, nil
}

// LatestLabels returns each model's latest real label time.
func (s *Store) LatestLabels(ctx context.Context) (map[string]time.Time, error) {
	out := map[string]time.Time{}
	err := each(ctx, s.read, sqlLatestLabels, nil, func(r *sql.Rows) error {
		var name string
		var at int64
		if err := r.Scan(&name, &at); err != nil {
			return err
		}
		out[name] = fromMicros(at)
		return nil
	})
	if err != nil {
		return nil, unavailable("read latest labels", err)
	}
	return out, nil
}
