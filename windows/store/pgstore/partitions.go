package pgstore

import (
	"context"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"
)

// day is the width of a label_versions partition: the UTC day of the
// prediction's bucket start.
const day = 24 * time.Hour

// modelDay is one model's rows in one day's partition.
type modelDay struct {
	model int32
	day   int64 // Unix microseconds of the day's start
}

// dayOf returns the start of the UTC day holding t.
func dayOf(t time.Time) time.Time { return t.UTC().Truncate(day) }

// partitionName names the label_versions partition of day d.
func partitionName(d time.Time) string { return "label_versions_" + d.Format("20060102") }

// ensureDays makes sure the day partitions of need exist and that
// raw_partitions lists each (model, day), in a short transaction of its
// own: creating a partition takes a strong lock on the parent table, which
// must not be held by an ingest transaction. A process remembers what it
// ensured, so a steady stream of batches skips this step.
func (s *Store) ensureDays(ctx context.Context, need []modelDay) error {
	s.mu.Lock()
	var miss []modelDay
	for _, md := range need {
		if !s.days[md] && !slices.Contains(miss, md) {
			miss = append(miss, md)
		}
	}
	s.mu.Unlock()
	if len(miss) == 0 {
		return nil
	}
	models := make([]int32, len(miss))
	days := make([]time.Time, len(miss))
	var names []string
	for i, md := range miss {
		models[i], days[i] = md.model, time.UnixMicro(md.day).UTC()
		if n := partitionName(days[i]); !slices.Contains(names, n) {
			names = append(names, n)
		}
	}
	err := pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, sqlLockXact, s.keys.ddl); err != nil {
			return err
		}
		missing, err := queryStrings(ctx, tx, sqlMissingRel, names)
		if err != nil {
			return err
		}
		for _, d := range days {
			name := partitionName(d)
			if !slices.Contains(missing, name) {
				continue
			}
			ddl := fmt.Sprintf("CREATE TABLE %s PARTITION OF label_versions FOR VALUES FROM ('%s') TO ('%s')",
				pgx.Identifier{name}.Sanitize(), d.Format(time.RFC3339), d.Add(day).Format(time.RFC3339))
			if _, err := tx.Exec(ctx, ddl); err != nil {
				return err
			}
			missing = slices.DeleteFunc(missing, func(n string) bool { return n == name })
		}
		_, err = tx.Exec(ctx, sqlAddDays, models, days)
		return err
	})
	if err != nil {
		return fmt.Errorf("create day partitions: %w", err)
	}
	s.mu.Lock()
	for _, md := range miss {
		s.days[md] = true
	}
	s.mu.Unlock()
	return nil
}

// dropDays drops the partitions of every day whose models have all purged
// past it, in a transaction of its own.
func (s *Store) dropDays(ctx context.Context) error {
	var dropped []time.Time
	err := pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
		dropped = dropped[:0]
		if _, err := tx.Exec(ctx, sqlLockXact, s.keys.ddl); err != nil {
			return err
		}
		rows, err := tx.Query(ctx, sqlDroppableDays)
		if err != nil {
			return err
		}
		days, err := pgx.CollectRows(rows, pgx.RowTo[time.Time])
		if err != nil {
			return err
		}
		for _, d := range days {
			if _, err := tx.Exec(ctx, "DROP TABLE IF EXISTS "+pgx.Identifier{partitionName(d)}.Sanitize()); err != nil {
				return err
			}
			if _, err := tx.Exec(ctx, sqlForgetDayAll, d); err != nil {
				return err
			}
			dropped = append(dropped, d)
		}
		return nil
	})
	if err != nil {
		return err
	}
	s.forgetDays(func(md modelDay) bool {
		return slices.ContainsFunc(dropped, func(d time.Time) bool { return d.UnixMicro() == md.day })
	})
	return nil
}

// forgetDays drops the cached (model, day) entries that match.
func (s *Store) forgetDays(match func(modelDay) bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	for md := range s.days {
		if match(md) {
			delete(s.days, md)
		}
	}
}

// queryStrings runs a query returning one text column.
func queryStrings(ctx context.Context, tx pgx.Tx, sql string, args ...any) ([]string, error) {
	rows, err := tx.Query(ctx, sql, args...)
	if err != nil {
		return nil, err
	}
	return pgx.CollectRows(rows, pgx.RowTo[string])
}
