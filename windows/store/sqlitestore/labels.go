package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// IngestLabels applies a batch of label versions in one transaction; see
// store.Store. A label line costs one key lookup of its prediction and one
// insert (of the version, or of the early label), plus an update of the
// prediction's current label when it changes.
func (s *Store) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	res := store.LabelResult{Outcomes: make([]store.LabelOutcome, len(batch))}
	if len(batch) == 0 {
		return res, nil
	}
	tx, err := s.beginIngest(ctx, "begin label batch")
	if err != nil {
		return res, err
	}
	defer tx.Rollback()
	w := labelWriter{
		lookup: tx.stmt(ctx, sqlPredictionLabel), insertEarly: tx.stmt(ctx, sqlInsertEarly),
		insertVersion: tx.stmt(ctx, sqlInsertVersion), setLabel: tx.stmt(ctx, sqlSetLabel),
		acc: newAccumulator(), received: micros(now),
	}
	for i, l := range batch {
		id, err := w.acc.model(ctx, s, tx, l.Model)
		if err != nil {
			return res, fmt.Errorf("label line %d: %w", i+1, err)
		}
		if res.Outcomes[i], err = w.apply(ctx, id, l); err != nil {
			return res, err
		}
	}
	if err := w.acc.flush(ctx, tx); err != nil {
		return res, err
	}
	if err := tx.Commit(); err != nil {
		return res, unavailable("commit label batch", err)
	}
	res.Changes = w.acc.changes()
	return res, nil
}

// labelWriter applies the lines of one label batch.
type labelWriter struct {
	lookup, insertEarly, insertVersion, setLabel *sql.Stmt
	acc                                          *accumulator
	received                                     int64
}

// apply applies one label line of model id and returns its outcome.
func (w *labelWriter) apply(ctx context.Context, id int64, l store.Label) (store.LabelOutcome, error) {
	at := micros(l.At)
	var (
		bucket             int64
		segment, predicted string
		cur                sql.NullString
		curAt, curImplied  sql.NullInt64
	)
	err := w.lookup.QueryRowContext(ctx, id, l.ID).Scan(&bucket, &segment, &predicted, &cur, &curAt, &curImplied)
	if errors.Is(err, sql.ErrNoRows) {
		n, err := affected(w.insertEarly.ExecContext(ctx, id, l.ID, at, l.Actual, w.received))
		if err != nil {
			return 0, unavailable("insert early label", err)
		}
		if n == 0 {
			return store.LabelDuplicate, nil // this early version is already held
		}
		return store.LabelEarly, nil
	}
	if err != nil {
		return 0, unavailable("look up prediction", err)
	}
	n, err := affected(w.insertVersion.ExecContext(ctx, id, l.ID, 0, at, l.Actual, w.received))
	if err != nil {
		return 0, unavailable("insert label version", err)
	}
	if n == 0 { // a known version was already ranked
		return store.LabelDuplicate, nil
	}
	// A new real version becomes current when there is no version yet,
	// when the current one is implied (a real version always wins), or
	// when it ranks above the current real one.
	becomes := !cur.Valid || curImplied.Int64 == 1 || later(at, l.Actual, curAt.Int64, cur.String)
	if !becomes {
		return store.LabelDuplicate, nil
	}
	if _, err := w.setLabel.ExecContext(ctx, l.Actual, at, 0, id, l.ID); err != nil {
		return 0, unavailable("set current label", err)
	}
	switch {
	case !cur.Valid:
		w.acc.addCell(id, bucket, segment, l.Actual, predicted, 1)
		w.acc.labeled(id, 1)
		return store.LabelMatched, nil
	case cur.String != l.Actual:
		w.acc.addCell(id, bucket, segment, cur.String, predicted, -1)
		w.acc.addCell(id, bucket, segment, l.Actual, predicted, 1)
		return store.LabelCorrected, nil
	}
	// Same actual, newer version (or the real version confirming an
	// implied one): no cell moves.
	return store.LabelDuplicate, nil
}

// ApplyLabelTimeout gives due unlabeled predictions their implied version;
// see store.Store. It is three set-based statements over the partial index
// of unlabeled predictions.
func (s *Store) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	tx, err := s.beginIngest(ctx, "begin label timeout")
	if err != nil {
		return 0, store.Changes{}, err
	}
	defer tx.Rollback()
	acc := newAccumulator()
	id, err := acc.model(ctx, s, tx, model)
	if err != nil {
		return 0, store.Changes{}, err
	}
	cutoff, shift := micros(now)-timeout.Microseconds(), timeout.Microseconds()

	rows, err := tx.QueryContext(ctx, sqlDueGroups, id, cutoff)
	if err != nil {
		return 0, store.Changes{}, unavailable("find due predictions", err)
	}
	for rows.Next() {
		var (
			bucket, n          int64
			segment, predicted string
		)
		if err := rows.Scan(&bucket, &segment, &predicted, &n); err != nil {
			rows.Close()
			return 0, store.Changes{}, unavailable("find due predictions", err)
		}
		acc.addCell(id, bucket, segment, label, predicted, n)
	}
	if err := errors.Join(rows.Err(), rows.Close()); err != nil {
		return 0, store.Changes{}, unavailable("find due predictions", err)
	}
	if len(acc.cells) == 0 {
		return 0, store.Changes{}, nil
	}
	if _, err := tx.ExecContext(ctx, sqlInsertImplied, id, cutoff, shift, label, micros(now)); err != nil {
		return 0, store.Changes{}, unavailable("insert implied labels", err)
	}
	n, err := affected(tx.ExecContext(ctx, sqlSetImplied, id, cutoff, shift, label))
	if err != nil {
		return 0, store.Changes{}, unavailable("set implied labels", err)
	}
	acc.labeled(id, n)
	if err := acc.flush(ctx, tx); err != nil {
		return 0, store.Changes{}, err
	}
	if err := tx.Commit(); err != nil {
		return 0, store.Changes{}, unavailable("commit label timeout", err)
	}
	return n, acc.changes(), nil
}

// ExpireEarlyLabels drops early labels received at or before now−ttl; see
// store.Store.
func (s *Store) ExpireEarlyLabels(ctx context.Context, model string, ttl time.Duration, now time.Time) (int64, error) {
	id, err := s.modelID(ctx, s.read, model)
	if err != nil {
		return 0, err
	}
	n, err := affected(s.write.ExecContext(ctx, sqlExpireEarly, id, micros(now)-ttl.Microseconds()))
	if err != nil {
		return 0, unavailable("expire early labels", err)
	}
	return n, nil
}
