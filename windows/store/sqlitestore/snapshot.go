package sqlitestore

import (
	"context"
	"database/sql"

	"github.com/classwatch/classwatch/windows/store"
)

// sqlTakeSnapshot is the first statement of a Snapshot transaction. BEGIN
// on a read connection is deferred: SQLite starts the read transaction,
// and in WAL mode fixes the snapshot it reads, at the first statement that
// reads a table (a bare SELECT 1 reads none and would fix nothing). The
// transaction then keeps that snapshot until it ends, on the one
// connection database/sql pins to it.
const sqlTakeSnapshot = `SELECT COUNT(*) FROM models`

// Snapshot runs readFunc on one read transaction of a read connection; see
// store.Store. The writer goes on committing beside it (WAL), unseen by
// the snapshot.
func (s *Store) Snapshot(ctx context.Context, fixedFunc func(), readFunc func(r store.SnapshotReader) error) error {
	tx, err := s.read.BeginTx(ctx, &sql.TxOptions{ReadOnly: true})
	if err != nil {
		return unavailable("begin snapshot", err)
	}
	defer tx.Rollback()
	var n int64
	if err := tx.QueryRowContext(ctx, sqlTakeSnapshot).Scan(&n); err != nil {
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
	tx *sql.Tx
}

// Models lists the models as Store.Models does, at the snapshot.
func (r *snapshotReader) Models(ctx context.Context) ([]store.ModelInfo, error) {
	return readModels(ctx, r.tx)
}

// Counts reads q as Store.Counts does, at the snapshot.
func (r *snapshotReader) Counts(ctx context.Context, q store.Query) (store.Counts, error) {
	id, err := r.s.modelID(ctx, r.tx, q.Model)
	if err != nil {
		return store.Counts{}, err
	}
	args := []any{id, micros(q.From), micros(q.To), segmentArg(q.Segment)}
	out, err := countsIn(ctx, r.tx, sqlCells, sqlPredicted, args)
	if err != nil {
		return store.Counts{}, err
	}
	return out, scoresIn(ctx, r.tx, &out, args)
}
