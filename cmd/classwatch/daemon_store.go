package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"time"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// Backoff between attempts to reach the store at start.
const (
	firstStoreRetry = 250 * time.Millisecond
	maxStoreRetry   = 10 * time.Second
)

// commitFailureHold is how long /readyz stays unready after a failed
// commit when nothing commits since: long enough for a load balancer to
// notice, short enough that retried traffic finds a recovered store.
const commitFailureHold = 30 * time.Second

// openStore opens the configured backend: PostgreSQL when a URL is set,
// otherwise the SQLite file under data_dir (created if missing, and
// checked to be writable first).
func openStore(ctx context.Context, cfg config) (store.Store, error) {
	if cfg.Database != "" {
		s, err := pgstore.Open(ctx, cfg.Database, pgstore.Options{})
		if err != nil {
			return nil, fmt.Errorf("open postgres store: %w", err)
		}
		return s, nil
	}
	if err := checkDataDir(cfg.DataDir, cfg.sqlitePath()); err != nil {
		return nil, err
	}
	s, err := sqlitestore.Open(ctx, cfg.sqlitePath(), sqlitestore.Options{})
	if err != nil {
		return nil, fmt.Errorf("open sqlite store: %w", err)
	}
	return s, nil
}

// checkDataDir makes sure the embedded store can write under dir: the
// directory exists or can be created, a file can be created in it (SQLite
// writes its journal beside the database), and an existing database file
// opens for writing. The error names the path and what to do.
func checkDataDir(dir, dbFile string) error {
	advice := "give the user running classwatch write access to it, set data_dir to a writable directory, or set database to a PostgreSQL URL"
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return fmt.Errorf("create data_dir %s: %w; %s", dir, err, advice)
	}
	probe, err := os.CreateTemp(dir, ".classwatch-write-check-*")
	if err != nil {
		return fmt.Errorf("data_dir %s is not writable: %w; %s", dir, err, advice)
	}
	name := probe.Name()
	probe.Close()
	if err := os.Remove(name); err != nil {
		return fmt.Errorf("data_dir %s: remove write check: %w", dir, err)
	}
	f, err := os.OpenFile(dbFile, os.O_RDWR, 0)
	switch {
	case errors.Is(err, os.ErrNotExist):
		return nil
	case err != nil:
		return fmt.Errorf("database file %s is not writable: %w; %s", filepath.Clean(dbFile), err, advice)
	}
	return f.Close()
}

// prepareStore brings the schema up to date, retrying an unreachable store
// with backoff until cfg.StoreWait has passed. Meanwhile report receives
// why the daemon is not ready yet (without hosts or users, which stay in
// the log).
func (d *daemon) prepareStore(ctx context.Context, report func(reason string)) error {
	deadline := time.Now().Add(time.Duration(d.cfg.StoreWait))
	wait := firstStoreRetry
	for attempt := 1; ; attempt++ {
		err := d.store.Migrate(ctx)
		if err == nil {
			return nil
		}
		if !retryableStoreError(err) || ctx.Err() != nil || time.Now().Add(wait).After(deadline) {
			return fmt.Errorf("migrate: %w", err)
		}
		reason := fmt.Sprintf("waiting for the store, which does not answer (attempt %d; giving up at %s)",
			attempt, deadline.UTC().Format(time.RFC3339))
		report(reason)
		d.log.Warn("store not reachable; retrying", "attempt", attempt, "retry_in", wait.String(), "err", err)
		select {
		case <-ctx.Done():
			return fmt.Errorf("migrate: %w", ctx.Err())
		case <-time.After(wait):
		}
		wait = min(2*wait, maxStoreRetry)
	}
}

// retryableStoreError reports whether waiting may cure err: the store is
// unreachable, not refusing the daemon's credentials or database name.
func retryableStoreError(err error) bool {
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) {
		switch pgErr.Code[:2] {
		case "28", "3D": // invalid authorization, invalid catalog name
			return false
		}
	}
	return errors.Is(err, store.ErrUnavailable)
}

// storeHealth remembers whether the last write to the store committed, for
// /readyz: a store can answer reads while it cannot commit (a full disk, a
// read-only replica).
type storeHealth struct {
	mu       sync.Mutex
	failedAt time.Time // zero when the last write committed
	now      func() time.Time
}

// record notes the outcome of one write. A cancelled request says nothing
// about the store.
func (h *storeHealth) record(ctx context.Context, err error) {
	if err != nil && ctx.Err() != nil {
		return
	}
	h.mu.Lock()
	defer h.mu.Unlock()
	if err == nil {
		h.failedAt = time.Time{}
	} else {
		h.failedAt = h.now()
	}
}

// failing returns why the store is not ready to commit, or "".
func (h *storeHealth) failing() string {
	h.mu.Lock()
	defer h.mu.Unlock()
	if h.failedAt.IsZero() || h.now().Sub(h.failedAt) > commitFailureHold {
		return ""
	}
	return "the store could not commit the last write (at " + h.failedAt.UTC().Format(time.RFC3339) + ")"
}

// watchedStore reports the outcome of every write that changes counts to
// its storeHealth.
type watchedStore struct {
	store.Store
	health *storeHealth
}

// IngestPredictions writes a prediction batch and records the outcome.
func (s watchedStore) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	r, err := s.Store.IngestPredictions(ctx, batch, now)
	s.health.record(ctx, err)
	return r, err
}

// IngestLabels writes a label batch and records the outcome.
func (s watchedStore) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	r, err := s.Store.IngestLabels(ctx, batch, now)
	s.health.record(ctx, err)
	return r, err
}

// ApplyLabelTimeout applies default labels and records the outcome.
func (s watchedStore) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	n, ch, err := s.Store.ApplyLabelTimeout(ctx, model, label, timeout, now)
	s.health.record(ctx, err)
	return n, ch, err
}
