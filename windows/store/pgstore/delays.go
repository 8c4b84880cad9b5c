package pgstore

import (
	"context"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlLabelDelays bins, per prediction of $1 in [$2, $3) (segment $4) made
// by $5, the seconds from its at to its first real label version known at
// $5; width_bucket returns how many of the edges $6 are ≤ the delay.
const sqlLabelDelays = `WITH p AS (
    SELECT bucket, pkey, at FROM predictions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND ($4::text IS NULL OR segment = $4) AND at <= $5
), v AS (
    SELECT bucket, pkey, min(at) AS first FROM label_versions
    WHERE model_id = $1 AND bucket >= $2 AND bucket < $3 AND at <= $5 AND NOT implied
    GROUP BY bucket, pkey
)
SELECT width_bucket(extract(epoch FROM v.first - p.at)::float8, $6::float8[]), count(*)
FROM p JOIN v ON v.bucket = p.bucket AND v.pkey = p.pkey
GROUP BY 1`

// sqlLatestLabels finds each model's latest real label version.
const sqlLatestLabels = `SELECT m.name, max(v.at) FROM label_versions v JOIN models m ON m.model_id = v.model_id
WHERE NOT v.implied GROUP BY m.name`

// LabelDelays bins the label delays of q's predictions as known at asOf.
func (s *Store) LabelDelays(ctx context.Context, q store.Query, asOf time.Time, edges []time.Duration) ([]int64, error) {
	id, err := s.modelID(ctx, q.Model)
	if err != nil {
		return nil, err
	}
	secs := make([]float64, len(edges))
	for i, e := range edges {
		secs[i] = e.Seconds()
	}
	out := make([]int64, len(edges)+1)
	rows, err := s.pool.Query(ctx, sqlLabelDelays, id, micro(q.From), micro(q.To), q.Segment, micro(asOf), secs)
	if err != nil {
		return nil, unavailable("read label delays", err)
	}
	var bin int
	var n int64
	if _, err := pgx.ForEachRow(rows, []any{&bin, &n}, func() error {
		out[bin] += n
		return nil
	}); err != nil {
		return nil, unavailable("read label delays", err)
	}
	return out, nil
}

// LatestLabels returns each model's latest real label time.
func (s *Store) LatestLabels(ctx context.Context) (map[string]time.Time, error) {
	rows, err := s.pool.Query(ctx, sqlLatestLabels)
	if err != nil {
		return nil, unavailable("read latest labels", err)
	}
	out := map[string]time.Time{}
	var name string
	var at time.Time
	if _, err := pgx.ForEachRow(rows, []any{&name, &at}, func() error {
		out[name] = at.UTC()
		return nil
	}); err != nil {
		return nil, unavailable("read latest labels", err)
	}
	return out, nil
}
