package pgstore

import (
	"context"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlTakeSnapshot is the first statement of a Snapshot transaction. A
// repeatable-read transaction takes its snapshot at its first statement,
// not at BEGIN, so Snapshot runs this one before it reports the snapshot
// fixed.
const sqlTakeSnapshot = `SELECT 1`

// Snapshot runs readFunc on one read-only repeatable-read transaction; see
// store.Store. The transaction holds one pooled connection until readFunc
// returns.
func (s *Store) Snapshot(ctx context.Context, fixedFunc func(), readFunc func(r store.SnapshotReader) error) error {
	tx, err := s.pool.BeginTx(ctx, pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly})
	if err != nil {
		return unavailable("begin snapshot", err)
	}
	// The transaction only read: ending it by rollback loses nothing, and
	// should the rollback fail, pgx closes the connection, which ends it.
	defer tx.Rollback(context.WithoutCancel(ctx))
	if _, err := tx.Exec(ctx, sqlTakeSnapshot); err != nil {
		return unavailable("take snapshot", err)
	}
	if fixedFunc != nil {
		fixedFunc()
	}
	return readFunc(&snapshotReader{s: s, tx: tx})
}

// snapshotReader reads through a Snapshot transaction.
type snapshotReader struct {
	s  *Store
	tx pgx.Tx
}

// Models lists the models as Store.Models does, at the snapshot.
func (r *snapshotReader) Models(ctx context.Context) ([]store.ModelInfo, error) {
	out, err := readModels(ctx, r.tx)
	if err != nil {
		return nil, unavailable("read models", err)
	}
	return out, nil
}

// Counts reads q as Store.Counts does, at the snapshot. The model's id may
// come from the pool rather than the snapshot: ids never change.
func (r *snapshotReader) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	id, err := r.s.modelID(ctx, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	args := []any{id, micro(q.From), micro(q.To), q.Segment}
	out, err := countsIn(ctx, r.tx, sqlCells, sqlPredicted, args...)
	if err == nil {
		err = scoresIn(ctx, r.tx, &out, args...)
	}
	if err != nil {
		return store.Counts{}, unavailable("read counts", err)
	}
	return out, nil
}
