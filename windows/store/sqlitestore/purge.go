package sqlitestore

import (
	"context"
	"time"
)

// PurgeRaw drops the raw predictions of buckets starting before cutoff and
// their label versions, keeping cells and counts; see store.Store. Verify
// skips those buckets from then on.
func (s *Store) PurgeRaw(ctx context.Context, model string, cutoff time.Time) (int64, error) {
	tx, err := s.write.BeginTx(ctx, nil)
	if err != nil {
		return 0, unavailable("begin purge", err)
	}
	defer tx.Rollback()
	id, err := s.modelID(ctx, tx, model)
	if err != nil {
		return 0, err
	}
	c := micros(cutoff)
	var n, labeled int64
	if err := tx.QueryRowContext(ctx, sqlPurgeTotals, id, c).Scan(&n, &labeled); err != nil {
		return 0, unavailable("count purged predictions", err)
	}
	if _, err := tx.ExecContext(ctx, sqlPurgeLabels, id, c); err != nil {
		return 0, unavailable("purge label versions", err)
	}
	if _, err := tx.ExecContext(ctx, sqlPurgePredictions, id, c); err != nil {
		return 0, unavailable("purge predictions", err)
	}
	if _, err := tx.ExecContext(ctx, sqlPurgeMark, id, n, labeled, c); err != nil {
		return 0, unavailable("mark purge", err)
	}
	if err := tx.Commit(); err != nil {
		return 0, unavailable("commit purge", err)
	}
	return n, nil
}
