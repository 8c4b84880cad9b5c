package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// EnsureModel registers model and its missing classes; see store.Store.
// When everything is registered already it only reads, so calling it for
// every batch costs no write lock.
func (s *Store) EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error) {
	have, err := s.classes(ctx, s.read, model)
	switch {
	case err == nil && len(store.MissingClasses(have, classes)) == 0:
		return have, nil
	case err != nil && !errors.Is(err, store.ErrUnknownModel):
		return nil, err
	}

	tx, err := s.write.BeginTx(ctx, nil)
	if err != nil {
		return nil, unavailable("begin model registration", err)
	}
	defer tx.Rollback()
	var id int64
	err = tx.QueryRowContext(ctx, sqlModelID, model).Scan(&id)
	if errors.Is(err, sql.ErrNoRows) {
		var r sql.Result
		if r, err = tx.ExecContext(ctx, sqlInsertModel, model); err == nil {
			id, err = r.LastInsertId()
		}
	}
	if err != nil {
		return nil, unavailable("register model", err)
	}
	if have, err = classesOf(ctx, tx, id); err != nil {
		return nil, err
	}
	add := store.MissingClasses(have, classes)
	if err := store.CheckClassLimit(model, have, add, maxClasses); err != nil {
		return nil, err
	}
	for i, c := range add {
		if _, err := tx.ExecContext(ctx, sqlInsertClass, id, len(have)+i, c); err != nil {
			return nil, unavailable("register class", err)
		}
	}
	if err := tx.Commit(); err != nil {
		return nil, unavailable("commit model registration", err)
	}
	s.mu.Lock()
	s.modelIDs[model] = id
	s.mu.Unlock()
	return append(have, add...), nil
}

// classes returns a registered model's class list.
func (s *Store) classes(ctx context.Context, q queryer, model string) ([]string, error) {
	id, err := s.modelID(ctx, q, model)
	if err != nil {
		return nil, err
	}
	return classesOf(ctx, q, id)
}

// queryer is the part of *sql.DB and *sql.Tx that reads need.
type queryer interface {
	queryRower
	QueryContext(ctx context.Context, query string, args ...any) (*sql.Rows, error)
}

func classesOf(ctx context.Context, q queryer, id int64) ([]string, error) {
	var out []string
	err := each(ctx, q, sqlClasses, []any{id}, func(r *sql.Rows) error {
		var c string
		if err := r.Scan(&c); err != nil {
			return err
		}
		out = append(out, c)
		return nil
	})
	if err != nil {
		return nil, unavailable("read classes", err)
	}
	return out, nil
}

// each runs query and calls scan for every row.
func each(ctx context.Context, q queryer, query string, args []any, scan func(*sql.Rows) error) error {
	rows, err := q.QueryContext(ctx, query, args...)
	if err != nil {
		return err
	}
	for rows.Next() {
		if err := scan(rows); err != nil {
			rows.Close()
			return err
		}
	}
	return errors.Join(rows.Err(), rows.Close())
}

// Models lists the registered models by name with their classes and
// maintained totals.
func (s *Store) Models(ctx context.Context) ([]store.ModelInfo, error) {
	return readModels(ctx, s.read)
}

// readModels runs Models' queries on q.
func readModels(ctx context.Context, q queryer) ([]store.ModelInfo, error) {
	var out []store.ModelInfo
	index := map[int64]int{}
	err := each(ctx, q, sqlModels, nil, func(r *sql.Rows) error {
		var (
			id     int64
			m      store.ModelInfo
			latest sql.NullInt64
		)
		if err := r.Scan(&id, &m.Name, &latest, &m.Predictions, &m.Labeled); err != nil {
			return err
		}
		if latest.Valid {
			m.LatestAt = fromMicros(latest.Int64)
		}
		index[id] = len(out)
		out = append(out, m)
		return nil
	})
	if err != nil {
		return nil, unavailable("read models", err)
	}
	// Classes are read after models: a model registered in between has no
	// entry in index and is skipped, so the listing stays consistent.
	err = each(ctx, q, sqlAllClasses, nil, func(r *sql.Rows) error {
		var (
			id   int64
			name string
		)
		if err := r.Scan(&id, &name); err != nil {
			return err
		}
		if i, ok := index[id]; ok {
			out[i].Classes = append(out[i].Classes, name)
		}
		return nil
	})
	if err != nil {
		return nil, unavailable("read classes", err)
	}
	return out, nil
}

// Counts reads the maintained cells and predicted-class counts of q.
func (s *Store) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	id, err := s.modelID(ctx, s.read, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	args := []any{id, micros(q.From), micros(q.To), segmentArg(q.Segment)}
	return s.readCounts(ctx, sqlCells, sqlPredicted, scoresIn, args)
}

// CountsAsOf recomputes q's figures from raw rows as known at asOf: each
// prediction made by asOf counts under its latest real label version with
// at ≤ asOf, else its implied version if that version's at ≤ asOf.
func (s *Store) CountsAsOf(ctx context.Context, q store.Query, asOf time.Time) (store.Counts, error) {
	id, err := s.modelID(ctx, s.read, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	args := []any{id, micros(q.From), micros(q.To), segmentArg(q.Segment), micros(asOf)}
	return s.readCounts(ctx, sqlCellsAsOf, sqlPredictedAsOf, scoresAsOf, args)
}

// scoreReader reads the score aggregates of a count read into out.
type scoreReader func(ctx context.Context, q queryer, out *store.Counts, args []any) error

// readCounts runs a cells query, a predicted-count query and a score read
// in one read transaction, so all see the same snapshot.
func (s *Store) readCounts(ctx context.Context, cellsQuery, predictedQuery string, scores scoreReader, args []any) (store.Counts, error) {
	tx, err := s.read.BeginTx(ctx, &sql.TxOptions{ReadOnly: true})
	if err != nil {
		return store.Counts{}, unavailable("begin read", err)
	}
	defer tx.Rollback()
	out, err := countsIn(ctx, tx, cellsQuery, predictedQuery, args)
	if err != nil {
		return store.Counts{}, err
	}
	return out, scores(ctx, tx, &out, args)
}

// countsIn runs a cells query and a predicted-count query on q, which must
// be a read transaction for the two to see the same snapshot.
func countsIn(ctx context.Context, q queryer, cellsQuery, predictedQuery string, args []any) (store.Counts, error) {
	var out store.Counts
	err := each(ctx, q, cellsQuery, args, func(r *sql.Rows) error {
		var (
			c      store.Cell
			bucket int64
		)
		if err := r.Scan(&bucket, &c.Actual, &c.Predicted, &c.N); err != nil {
			return err
		}
		c.Bucket = fromMicros(bucket)
		out.Cells = append(out.Cells, c)
		return nil
	})
	if err != nil {
		return store.Counts{}, unavailable("read cells", err)
	}
	err = each(ctx, q, predictedQuery, args, func(r *sql.Rows) error {
		var (
			p      store.PredictedCount
			bucket int64
		)
		if err := r.Scan(&bucket, &p.Predicted, &p.N); err != nil {
			return err
		}
		p.Bucket = fromMicros(bucket)
		out.Predicted = append(out.Predicted, p)
		return nil
	})
	if err != nil {
		return store.Counts{}, unavailable("read predicted counts", err)
	}
	return out, nil
}

// segmentArg binds Query.Segment: NULL selects every segment.
func segmentArg(seg *string) any {
	if seg == nil {
		return nil
	}
	return *seg
}

// Verify recounts every cell and predicted count from the raw rows still
// kept and returns where the maintained values differ, cells first.
func (s *Store) Verify(ctx context.Context) ([]store.Difference, error) {
	tx, err := s.read.BeginTx(ctx, &sql.TxOptions{ReadOnly: true})
	if err != nil {
		return nil, unavailable("begin verify", err)
	}
	defer tx.Rollback()
	var out []store.Difference
	err = each(ctx, tx, sqlVerifyCells, nil, func(r *sql.Rows) error {
		d := store.Difference{Kind: "cell"}
		var bucket int64
		if err := r.Scan(&d.Model, &bucket, &d.Segment, &d.Actual, &d.Predicted, &d.Stored, &d.Recounted); err != nil {
			return err
		}
		d.Bucket = fromMicros(bucket)
		out = append(out, d)
		return nil
	})
	if err != nil {
		return nil, unavailable("verify cells", err)
	}
	err = each(ctx, tx, sqlVerifyPredicted, nil, func(r *sql.Rows) error {
		d := store.Difference{Kind: "predicted"}
		var bucket int64
		if err := r.Scan(&d.Model, &bucket, &d.Segment, &d.Predicted, &d.Stored, &d.Recounted); err != nil {
			return err
		}
		d.Bucket = fromMicros(bucket)
		out = append(out, d)
		return nil
	})
	if err != nil {
		return nil, unavailable("verify predicted counts", err)
	}
	scores, err := verifyScores(ctx, tx)
	return append(out, scores...), err
}
