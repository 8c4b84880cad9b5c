package pgstore

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
)

// PurgeRaw drops model's raw predictions in buckets starting before cutoff
// with their label versions, keeping cells and counts; see
// store.Store. It returns how many predictions it dropped.
//
// The predictions rows are deleted (that table is global, see the package
// documentation). Label versions live in day partitions: a day that the
// cutoff passes entirely and that holds no other model's unpurged rows is
// dropped whole, after the rows are deleted, in a short transaction of its
// own; in a day the cutoff splits, or one shared with a model that still
// keeps it, this model's versions are deleted row by row. A daemon that
// passes cutoffs at midnight UTC therefore never deletes label history row
// by row, unless models sharing the days have different retention.
func (s *Store) PurgeRaw(ctx context.Context, model string, cutoff time.Time) (int64, error) {
	id, err := s.modelID(ctx, model)
	if err != nil {
		return 0, err
	}
	cutoff = micro(cutoff)
	if err := s.summarize(ctx); err != nil {
		return 0, err
	}
	var (
		n      int64
		forgot []modelDay
	)
	err = s.retry(ctx, func() error {
		n, forgot = 0, forgot[:0]
		return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
			// The label lock keeps label batches from adding versions to
			// predictions being deleted.
			if _, err := tx.Exec(ctx, sqlLockModels, s.keys.label, []int32{id}); err != nil {
				return err
			}
			if _, err := tx.Exec(ctx, sqlMarkPurged, id, cutoff); err != nil {
				return err
			}
			tag, err := tx.Exec(ctx, sqlPurgePreds, id, cutoff)
			if err != nil {
				return err
			}
			n = tag.RowsAffected()
			rows, err := tx.Query(ctx, sqlPurgeDays, id, cutoff)
			if err != nil {
				return err
			}
			type dayInfo struct {
				day           time.Time
				whole, shared bool
			}
			var info dayInfo
			var days []dayInfo
			if _, err := pgx.ForEachRow(rows, []any{&info.day, &info.whole, &info.shared}, func() error {
				days = append(days, info)
				return nil
			}); err != nil {
				return err
			}
			for _, d := range days {
				if d.whole && !d.shared {
					continue // dropped whole below
				}
				del := fmt.Sprintf("DELETE FROM %s WHERE model_id = $1 AND bucket < $2",
					pgx.Identifier{partitionName(d.day)}.Sanitize())
				if _, err := tx.Exec(ctx, del, id, cutoff); err != nil {
					return err
				}
				if d.whole {
					if _, err := tx.Exec(ctx, sqlForgetDay, id, d.day); err != nil {
						return err
					}
					forgot = append(forgot, modelDay{id, d.day.UnixMicro()})
				}
			}
			return nil
		})
	})
	if err != nil {
		return 0, unavailable("purge raw predictions", err)
	}
	s.forgetDays(func(md modelDay) bool {
		for _, f := range forgot {
			if f == md {
				return true
			}
		}
		return false
	})
	if err := s.dropDays(ctx); err != nil {
		return n, unavailable("drop purged day partitions", err)
	}
	return n, nil
}
