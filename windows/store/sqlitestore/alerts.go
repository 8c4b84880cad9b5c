package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// SaveAlert upserts rec as the alert's current state and, when history is
// true, appends it to the history, in one transaction.
func (s *Store) SaveAlert(ctx context.Context, rec store.AlertRecord, history bool) error {
	tx, err := s.write.BeginTx(ctx, nil)
	if err != nil {
		return unavailable("begin alert save", err)
	}
	defer tx.Rollback()
	args := []any{rec.Key, rec.Rule, rec.Model, rec.Class, rec.State, rec.Data, micros(rec.UpdatedAt)}
	if _, err := tx.ExecContext(ctx, sqlUpsertAlert, args...); err != nil {
		return unavailable("save alert", err)
	}
	if history {
		if _, err := tx.ExecContext(ctx, sqlInsertAlertHistory, args...); err != nil {
			return unavailable("append alert history", err)
		}
	}
	if err := tx.Commit(); err != nil {
		return unavailable("commit alert save", err)
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
	if limit <= 0 {
		limit = -1 // SQLite reads a negative LIMIT as none
	}
	out, err := s.alertRecords(ctx, sqlAlertHistory, micros(from), micros(to), limit)
	if err != nil {
		return nil, unavailable("read alert history", err)
	}
	return out, nil
}

func (s *Store) alertRecords(ctx context.Context, query string, args ...any) ([]store.AlertRecord, error) {
	var out []store.AlertRecord
	err := each(ctx, s.read, query, args, func(r *sql.Rows) error {
		var (
			rec     store.AlertRecord
			updated int64
		)
		if err := r.Scan(&rec.Key, &rec.Rule, &rec.Model, &rec.Class, &rec.State, &rec.Data, &updated); err != nil {
			return err
		}
		rec.UpdatedAt = fromMicros(updated)
		out = append(out, rec)
		return nil
	})
	return out, err
}

// errLeaseLost is what Alive returns once a lease was released or its
// store closed.
var errLeaseLost = errors.New("lead lock no longer held")

// TryLead takes the named lock if no other lease of this Store holds it.
// The lock lives in memory (see the package documentation): the SQLite file
// serves one daemon, so there is no other process to exclude.
func (s *Store) TryLead(ctx context.Context, name string) (store.Lease, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return nil, fmt.Errorf("take lead lock %q: %w: store closed", name, store.ErrUnavailable)
	}
	if _, held := s.leases[name]; held {
		return nil, nil
	}
	l := &lease{s: s, name: name}
	s.leases[name] = l
	return l, nil
}

// lease is a held in-memory lead lock.
type lease struct {
	s    *Store
	name string
}

// Alive returns nil while l still holds its lock.
func (l *lease) Alive(ctx context.Context) error {
	l.s.mu.Lock()
	defer l.s.mu.Unlock()
	if l.s.leases[l.name] != l {
		return fmt.Errorf("lead lock %q: %w", l.name, errLeaseLost)
	}
	return nil
}

// Release gives the lock up; a second call does nothing.
func (l *lease) Release(ctx context.Context) error {
	l.s.mu.Lock()
	defer l.s.mu.Unlock()
	if l.s.leases[l.name] == l {
		delete(l.s.leases, l.name)
	}
	return nil
}
