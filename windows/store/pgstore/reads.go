package pgstore

import (
	"context"
	"errors"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// EnsureModel registers model and its missing classes; see store.Store.
// When everything is registered already it only reads. Otherwise it locks
// the model's row, so concurrent registrations of one model queue and the
// class limit holds across daemons.
func (s *Store) EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error) {
	if id, err := s.modelID(ctx, model); err == nil {
		have, err := s.classes(ctx, s.pool, id)
		if err != nil {
			return nil, unavailable("read classes", err)
		}
		if len(store.MissingClasses(have, classes)) == 0 {
			return have, nil
		}
	} else if !errors.Is(err, store.ErrUnknownModel) {
		return nil, err
	}
	var (
		id  int32
		out []string
	)
	err := s.retry(ctx, func() error {
		return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, sqlInsertModel, model); err != nil {
				return err
			}
			if err := tx.QueryRow(ctx, sqlLockModel, model).Scan(&id); err != nil {
				return err
			}
			have, err := s.classes(ctx, tx, id)
			if err != nil {
				return err
			}
			add := store.MissingClasses(have, classes)
			if err := store.CheckClassLimit(model, have, add, maxClasses); err != nil {
				return err
			}
			if len(add) > 0 {
				if _, err := tx.Exec(ctx, sqlAddClasses, id, len(have), add); err != nil {
					return err
				}
			}
			out = append(have, add...)
			return nil
		})
	})
	if err != nil {
		return nil, unavailable("register model", err)
	}
	s.mu.Lock()
	s.models[model] = id
	s.mu.Unlock()
	return out, nil
}

// querier is the part of a pool and a transaction that reads need.
type querier interface {
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
}

func (s *Store) classes(ctx context.Context, q querier, id int32) ([]string, error) {
	rows, err := q.Query(ctx, sqlClasses, id)
	if err != nil {
		return nil, err
	}
	out, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if len(out) == 0 {
		out = nil
	}
	return out, err
}

// Models lists the registered models by name with their classes, the
// latest prediction time seen, and the stored (not purged) predictions and
// labeled ones, summed from the maintained counts.
func (s *Store) Models(ctx context.Context) ([]store.ModelInfo, error) {
	out, err := readModels(ctx, s.pool)
	if err != nil {
		return nil, unavailable("read models", err)
	}
	return out, nil
}

// readModels runs Models' query on q.
func readModels(ctx context.Context, q querier) ([]store.ModelInfo, error) {
	rows, err := q.Query(ctx, sqlModels)
	if err != nil {
		return nil, err
	}
	var (
		out    []store.ModelInfo
		m      store.ModelInfo
		latest *time.Time
	)
	_, err = pgx.ForEachRow(rows, []any{&m.Name, &m.Classes, &latest, &m.Predictions, &m.Labeled}, func() error {
		info := m
		info.LatestAt = time.Time{}
		if latest != nil {
			info.LatestAt = *latest
		}
		out = append(out, info)
		m.Classes = nil
		return nil
	})
	if err != nil {
		return nil, err
	}
	return out, nil
}

// Counts reads the maintained cells and predicted-class counts of q.
func (s *Store) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	id, err := s.modelID(ctx, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	return s.readCounts(ctx, sqlCells, sqlPredicted, scoresIn, id, micro(q.From), micro(q.To), q.Segment)
}

// CountsAsOf recomputes q's figures from raw rows as known at asOf: each
// prediction made by asOf counts under its latest real label version with
// at ≤ asOf, else its implied version if that version's at ≤ asOf.
func (s *Store) CountsAsOf(ctx context.Context, q store.Query, asOf time.Time) (store.Counts, error) {
	id, err := s.modelID(ctx, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	return s.readCounts(ctx, sqlCellsAsOf, sqlPredictedAsOf, scoresAsOf, id, micro(q.From), micro(q.To), q.Segment, micro(asOf))
}

// scoreReader reads the score aggregates of a count read into out.
type scoreReader func(ctx context.Context, tx querier, out *store.Counts, args ...any) error

// readCounts runs a cells query, a predicted-count query and a score read
// in one repeatable-read transaction, so all see the same snapshot.
func (s *Store) readCounts(ctx context.Context, cellsQuery, predictedQuery string, scores scoreReader, args ...any) (store.Counts, error) {
	var out store.Counts
	err := pgx.BeginTxFunc(ctx, s.pool, pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly}, func(tx pgx.Tx) error {
		var err error
		if out, err = countsIn(ctx, tx, cellsQuery, predictedQuery, args...); err != nil {
			return err
		}
		return scores(ctx, tx, &out, args...)
	})
	if err != nil {
		return store.Counts{}, unavailable("read counts", err)
	}
	return out, nil
}

// countsIn runs a cells query and a predicted-count query on tx.
func countsIn(ctx context.Context, tx querier, cellsQuery, predictedQuery string, args ...any) (store.Counts, error) {
	var out store.Counts
	rows, err := tx.Query(ctx, cellsQuery, args...)
	if err != nil {
		return store.Counts{}, err
	}
	var c store.Cell
	if _, err := pgx.ForEachRow(rows, []any{&c.Bucket, &c.Actual, &c.Predicted, &c.N}, func() error {
		out.Cells = append(out.Cells, c)
		return nil
	}); err != nil {
		return store.Counts{}, err
	}
	rows, err = tx.Query(ctx, predictedQuery, args...)
	if err != nil {
		return store.Counts{}, err
	}
	var p store.PredictedCount
	if _, err := pgx.ForEachRow(rows, []any{&p.Bucket, &p.Predicted, &p.N}, func() error {
		out.Predicted = append(out.Predicted, p)
		return nil
	}); err != nil {
		return store.Counts{}, err
	}
	return out, nil
}

// Verify recounts every cell and predicted count from the raw rows still
// kept and returns where the maintained values differ, cells first.
func (s *Store) Verify(ctx context.Context) ([]store.Difference, error) {
	var out []store.Difference
	err := pgx.BeginTxFunc(ctx, s.pool, pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly}, func(tx pgx.Tx) error {
		out = nil
		rows, err := tx.Query(ctx, sqlVerifyCells)
		if err != nil {
			return err
		}
		d := store.Difference{Kind: "cell"}
		if _, err := pgx.ForEachRow(rows, []any{&d.Model, &d.Bucket, &d.Segment, &d.Actual, &d.Predicted, &d.Stored, &d.Recounted}, func() error {
			out = append(out, d)
			return nil
		}); err != nil {
			return err
		}
		rows, err = tx.Query(ctx, sqlVerifyPredicted)
		if err != nil {
			return err
		}
		d = store.Difference{Kind: "predicted"}
		_, err = pgx.ForEachRow(rows, []any{&d.Model, &d.Bucket, &d.Segment, &d.Predicted, &d.Stored, &d.Recounted}, func() error {
			out = append(out, d)
			return nil
		})
		if err != nil {
			return err
		}
		scores, err := verifyScores(ctx, tx)
		out = append(out, scores...)
		return err
	})
	if err != nil {
		return nil, unavailable("verify", err)
	}
	return out, nil
}
