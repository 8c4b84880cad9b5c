package pgstore

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// day is the width of a label_versions partition: the UTC day of the
// prediction's bucket start.
const day = 24 * time.Hour

// maxNewDays bounds the label-history day partitions one DDL transaction
// creates, and the days one ApplyLabelTimeout call labels: each partition
// created holds a strong lock on label_versions until its transaction
// ends, so they are made a few at a time.
const maxNewDays = 32

// maxBatchDays bounds the new day partitions one batch may need: a year of
// prediction days and a leap day, enough for a label backfill over a year
// of predictions in one batch. A batch that needs more is refused with
// store.ErrLimit; see the package documentation.
const maxBatchDays = 366

// dropChunk is how many day partitions one transaction of PurgeRaw drops:
// dropping a partition locks the whole label_versions table against every
// ingest, so the drops go in short transactions, with ingest between them.
const dropChunk = 8

// modelDay is one model's rows in one day's partition.
type modelDay struct {
	model int32
	day   int64 // Unix microseconds of the day's start
}

// dayOf returns the start of the UTC day holding t.
func dayOf(t time.Time) time.Time { return t.UTC().Truncate(day) }

// partitionName names the label_versions partition of day d.
func partitionName(d time.Time) string { return "label_versions_" + d.Format("20060102") }

// missingDays is the error of an ingest attempt that is about to write
// label versions into days this process has not ensured: withDays ensures
// them and runs the attempt again.
type missingDays struct{ days []modelDay }

func (m *missingDays) Error() string {
	return fmt.Sprintf("%d label history days not ensured", len(m.days))
}

// needDays returns a *missingDays naming those of days (repeats allowed)
// this process has not ensured, or nil.
func (s *Store) needDays(days []modelDay) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	var miss []modelDay
	for _, md := range days {
		if !s.days[md] && !slices.Contains(miss, md) {
			miss = append(miss, md)
		}
	}
	if len(miss) == 0 {
		return nil
	}
	return &missingDays{miss}
}

// withDays runs attempt, a transaction that writes label versions only
// into days it has checked with needDays. When an attempt stops for
// missing days, withDays creates them (ensureDays, which refuses more than
// maxNewDays new partitions) and runs it again. So partitions are created
// only for days a batch really writes to, and never inside an ingest
// transaction.
func (s *Store) withDays(ctx context.Context, attempt func() error) error {
	var err error
	for range maxAttempts {
		err = attempt()
		var md *missingDays
		if !errors.As(err, &md) {
			return err
		}
		if err := s.ensureDays(ctx, md.days); err != nil {
			return err
		}
	}
	return err
}

// boundDays keeps the buckets (ascending) of the first maxNewDays days
// among them, and returns them with their days.
func boundDays(model int32, buckets []time.Time) ([]time.Time, []modelDay) {
	var days []modelDay
	for i, b := range buckets {
		md := modelDay{model, dayOf(b).UnixMicro()}
		if !slices.Contains(days, md) {
			if len(days) == maxNewDays {
				return buckets[:i], days
			}
			days = append(days, md)
		}
	}
	return buckets, days
}

// ensureDays makes sure the day partitions of need exist and that
// raw_partitions lists each (model, day), in short transactions of their
// own, maxNewDays partitions each: creating a partition takes a strong lock
// on the parent table, which must not be held by an ingest transaction. It
// refuses a batch that needs more than maxBatchDays new partitions
// (store.ErrLimit) before creating any. A process remembers what it
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
	var names []string
	for _, md := range miss {
		if n := partitionName(time.UnixMicro(md.day).UTC()); !slices.Contains(names, n) {
			names = append(names, n)
		}
	}
	missing, err := queryStrings(ctx, s.pool, sqlMissingRel, names)
	if err != nil {
		return fmt.Errorf("look up day partitions: %w", err)
	}
	if len(missing) > maxBatchDays {
		return fmt.Errorf("batch needs %d new label history day partitions, more than the %d one batch may create; send it in parts by prediction time: %w",
			len(missing), maxBatchDays, store.ErrLimit)
	}
	for chunk := range slices.Chunk(miss, maxNewDays) {
		if err := s.createDays(ctx, chunk); err != nil {
			return fmt.Errorf("create day partitions: %w", err)
		}
		s.mu.Lock()
		for _, md := range chunk {
			s.days[md] = true
		}
		s.mu.Unlock()
	}
	return nil
}

// createDays creates the missing day partitions of chunk and lists each
// (model, day) in raw_partitions, in one transaction.
func (s *Store) createDays(ctx context.Context, chunk []modelDay) error {
	models := make([]int32, len(chunk))
	days := make([]time.Time, len(chunk))
	var names []string
	for i, md := range chunk {
		models[i], days[i] = md.model, time.UnixMicro(md.day).UTC()
		if n := partitionName(days[i]); !slices.Contains(names, n) {
			names = append(names, n)
		}
	}
	return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, sqlLockXact, s.keys.ddl); err != nil {
			return err
		}
		missing, err := queryStrings(ctx, tx, sqlMissingRel, names)
		if err != nil {
			return err
		}
		// IF NOT EXISTS: the advisory lock makes no catalog news visible,
		// so a partition a concurrent batch has just created may still
		// look missing to the query above; CREATE TABLE locks the parent
		// first and then sees it.
		for _, d := range days {
			name := partitionName(d)
			if !slices.Contains(missing, name) {
				continue
			}
			ddl := fmt.Sprintf("CREATE TABLE IF NOT EXISTS %s PARTITION OF label_versions FOR VALUES FROM ('%s') TO ('%s')",
				pgx.Identifier{name}.Sanitize(), d.Format(time.RFC3339), d.Add(day).Format(time.RFC3339))
			if _, err := tx.Exec(ctx, ddl); err != nil {
				return err
			}
			missing = slices.DeleteFunc(missing, func(n string) bool { return n == name })
		}
		_, err = tx.Exec(ctx, sqlAddDays, models, days)
		return err
	})
}

// dropDays drops the partitions of every day whose models have all purged
// past it, dropChunk days per transaction.
func (s *Store) dropDays(ctx context.Context) error {
	for {
		var dropped []time.Time
		err := s.retry(ctx, func() error {
			dropped = dropped[:0]
			return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
				return dropSomeDays(ctx, tx, s.keys.ddl, &dropped)
			})
		})
		if err != nil {
			return err
		}
		s.forgetDays(func(md modelDay) bool {
			return slices.ContainsFunc(dropped, func(d time.Time) bool { return d.UnixMicro() == md.day })
		})
		if len(dropped) < dropChunk {
			return nil
		}
	}
}

// dropSomeDays drops up to dropChunk droppable days, oldest first, and
// records them in dropped.
func dropSomeDays(ctx context.Context, tx pgx.Tx, ddlKey int32, dropped *[]time.Time) error {
	if _, err := tx.Exec(ctx, sqlLockXact, ddlKey); err != nil {
		return err
	}
	rows, err := tx.Query(ctx, sqlDroppableDays, dropChunk)
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
		*dropped = append(*dropped, d)
	}
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
func queryStrings(ctx context.Context, tx conn, sql string, args ...any) ([]string, error) {
	rows, err := tx.Query(ctx, sql, args...)
	if err != nil {
		return nil, err
	}
	return pgx.CollectRows(rows, pgx.RowTo[string])
}
