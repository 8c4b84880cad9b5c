package pgstore

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"sync"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/classwatch/classwatch/windows/store"
)

// SaveAlert upserts rec as the alert's current state and, when history is
// true, appends it to the history, in one transaction.
func (s *Store) SaveAlert(ctx context.Context, rec store.AlertRecord, history bool) error {
	args := []any{rec.Key, rec.Rule, rec.Model, rec.Class, rec.State, rec.Data, micro(rec.UpdatedAt)}
	err := s.retry(ctx, func() error {
		return pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
			var b pgx.Batch
			b.Queue(sqlUpsertAlert, args...)
			if history {
				b.Queue(sqlInsertAlertHistory, args...)
			}
			return tx.SendBatch(ctx, &b).Close()
		})
	})
	if err != nil {
		return unavailable("save alert", err)
	}
	return nil
}

// Alerts returns every alert's current state, ordered by key.
func (s *Store) Alerts(ctx context.Context) ([]store.AlertRecord, error) {
	out, err := s.alertRecords(ctx, sqlAlerts)
	if err != nil {
		return nil, unavailable("read alerts", err)
	}
	return out, nil
}

// AlertHistory returns history records updated in [from, to), newest
// first (records with equal times in reverse order of saving), at most
// limit of them (0 = no limit).
func (s *Store) AlertHistory(ctx context.Context, from, to time.Time, limit int) ([]store.AlertRecord, error) {
	var lim *int
	if limit > 0 {
		lim = &limit
	}
	out, err := s.alertRecords(ctx, sqlAlertHistory, micro(from), micro(to), lim)
	if err != nil {
		return nil, unavailable("read alert history", err)
	}
	return out, nil
}

func (s *Store) alertRecords(ctx context.Context, sql string, args ...any) ([]store.AlertRecord, error) {
	rows, err := s.pool.Query(ctx, sql, args...)
	if err != nil {
		return nil, err
	}
	var (
		out []store.AlertRecord
		rec store.AlertRecord
	)
	_, err = pgx.ForEachRow(rows, []any{&rec.Key, &rec.Rule, &rec.Model, &rec.Class, &rec.State, &rec.Data, &rec.UpdatedAt}, func() error {
		out = append(out, rec)
		rec.Data = nil
		return nil
	})
	return out, err
}

// errLeaseLost is what Alive returns once a lease was released, its
// connection broke or its store closed.
var errLeaseLost = errors.New("lead lock no longer held")

// TryLead tries to take the named single-evaluator lock without waiting;
// see store.Store. The lock is a session advisory lock on a connection
// taken from the pool and kept by the lease until Release: if the process
// dies or the connection breaks, PostgreSQL ends the session and another
// daemon can take the lock.
func (s *Store) TryLead(ctx context.Context, name string) (store.Lease, error) {
	s.mu.Lock()
	closed := s.closed
	s.mu.Unlock()
	if closed {
		return nil, fmt.Errorf("take lead lock %q: %w: store closed", name, store.ErrUnavailable)
	}
	h := fnv.New64a()
	h.Write([]byte(s.keys.lead + name))
	key := int64(h.Sum64())
	conn, err := s.pool.Acquire(ctx)
	if err != nil {
		return nil, unavailable("take lead lock", err)
	}
	var ok bool
	if err := conn.QueryRow(ctx, sqlTryLead, key).Scan(&ok); err != nil {
		conn.Release()
		return nil, unavailable("take lead lock", err)
	}
	if !ok {
		conn.Release()
		return nil, nil
	}
	l := &lease{s: s, name: name, key: key, conn: conn}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		// Close ran meanwhile and will not see this lease: end its session.
		conn.Hijack().Close(ctx)
		return nil, fmt.Errorf("take lead lock %q: %w: store closed", name, store.ErrUnavailable)
	}
	s.leases[l] = struct{}{}
	return l, nil
}

// lease is a held lead lock and the connection holding it.
type lease struct {
	s    *Store
	name string
	key  int64

	mu   sync.Mutex
	conn *pgxpool.Conn // nil once released
}

// Alive returns nil while the session still holds the lock.
func (l *lease) Alive(ctx context.Context) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.conn == nil {
		return fmt.Errorf("lead lock %q: %w", l.name, errLeaseLost)
	}
	var held bool
	if err := l.conn.QueryRow(ctx, sqlLeadHeld, l.key).Scan(&held); err != nil {
		return fmt.Errorf("lead lock %q: %w: %w", l.name, errLeaseLost, err)
	}
	if !held {
		return fmt.Errorf("lead lock %q: %w", l.name, errLeaseLost)
	}
	return nil
}

// Release unlocks and returns the connection to the pool; a second call
// does nothing. If unlocking fails, the connection is closed instead, which
// ends the session and with it the lock.
func (l *lease) Release(ctx context.Context) error {
	l.mu.Lock()
	conn := l.conn
	l.conn = nil
	l.mu.Unlock()
	if conn == nil {
		return nil
	}
	l.s.mu.Lock()
	delete(l.s.leases, l)
	l.s.mu.Unlock()
	var released bool
	if err := conn.QueryRow(ctx, sqlUnlockLead, l.key).Scan(&released); err != nil || !released {
		return conn.Hijack().Close(ctx)
	}
	conn.Release()
	return nil
}
