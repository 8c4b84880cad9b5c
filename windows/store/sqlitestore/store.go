// Package sqlitestore implements store.Store in one embedded SQLite file,
// through modernc.org/sqlite (pure Go, no cgo). It is classwatch's default
// store when no database URL is configured, so a first run needs nothing
// installed.
//
// # Durability
//
// The file runs in WAL mode. By default synchronous=FULL: every commit
// syncs the write-ahead log before IngestPredictions or IngestLabels
// returns, so an acknowledged batch survives a process crash, an operating
// system crash and a power loss. Options.RelaxedSync selects
// synchronous=NORMAL, which syncs only at checkpoints: a committed batch
// still survives a process crash (the log is in the operating system's
// cache), but the last commits before a power loss or kernel crash may be
// lost, so a client that dropped its copy after the 2xx would lose those
// lines. Either way a commit is atomic: a crash never keeps half a batch.
//
// # Concurrency
//
// SQLite admits one writer at a time. Writes go through a pool of exactly
// one connection, so the daemon's own writers queue in Go instead of
// failing with SQLITE_BUSY, and every write transaction starts with BEGIN
// IMMEDIATE so that another process (a backfill with classwatch ingest)
// waits for the lock up to Options.BusyTimeout rather than deadlocking on a
// lock upgrade. Reads use a separate pool of query-only connections, which
// WAL lets run beside the writer on the last committed snapshot.
//
// # Leadership
//
// TryLead keeps its locks in memory: the file is meant for one daemon, so
// two stores opened on the same file (two processes) do not exclude each
// other. Several replicas need the PostgreSQL store.
//
// A Store is safe for concurrent use by multiple goroutines.
package sqlitestore

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/classwatch/classwatch/windows/store"

	// The pure-Go SQLite driver, registered as "sqlite".
	_ "modernc.org/sqlite"
)

var _ store.Store = (*Store)(nil)

// Options tune an opened Store. The zero value is the durable default.
type Options struct {
	// BusyTimeout is how long a statement waits for a lock held by another
	// process before it fails; 0 means 5s.
	BusyTimeout time.Duration
	// ReadConns caps the connections used by reads; 0 means 4.
	ReadConns int
	// RelaxedSync selects synchronous=NORMAL instead of FULL: faster commits
	// that survive a process crash but not a power loss (see the package
	// documentation).
	RelaxedSync bool
}

// Store is an embedded SQLite store. It is safe for concurrent use.
type Store struct {
	write *sql.DB // exactly one connection: the single writer
	read  *sql.DB // query-only connections

	mu       sync.Mutex
	modelIDs map[string]int64  // committed models; a model is never deleted
	leases   map[string]*lease // held TryLead locks by name
	closed   bool

	stmtMu sync.Mutex
	stmts  map[string]*sql.Stmt // ingest statements prepared on the writer; nil until first use
}

// writeCacheKiB sizes the writer's page cache. Each ingested line walks
// three or four B-trees by a random key (the prediction id), so pages
// evicted from SQLite's default 2 MiB cache would be read back from the
// operating system over and over once the tables outgrow it.
const writeCacheKiB = 64 << 10

// Open opens (creating if needed) the SQLite database file at path. It does
// not migrate: call Migrate before use.
func Open(ctx context.Context, path string, opts Options) (*Store, error) {
	if path == "" {
		return nil, errors.New("open sqlite store: empty path")
	}
	if strings.ContainsRune(path, '?') {
		return nil, fmt.Errorf("open sqlite store %s: path must not contain '?'", path)
	}
	if opts.BusyTimeout <= 0 {
		opts.BusyTimeout = 5 * time.Second
	}
	if opts.ReadConns <= 0 {
		opts.ReadConns = 4
	}
	syncMode := "FULL"
	if opts.RelaxedSync {
		syncMode = "NORMAL"
	}
	busy := strconv.FormatInt(opts.BusyTimeout.Milliseconds(), 10)
	wq := url.Values{
		"_busy_timeout": {busy},
		"_foreign_keys": {"1"},
		"_journal_mode": {"WAL"},
		"_synchronous":  {syncMode},
		"_txlock":       {"immediate"},
		"_pragma":       {fmt.Sprintf("cache_size(-%d)", writeCacheKiB)},
	}
	write, err := sql.Open("sqlite", path+"?"+wq.Encode())
	if err != nil {
		return nil, fmt.Errorf("open sqlite store %s: %w", path, err)
	}
	write.SetMaxOpenConns(1)
	write.SetMaxIdleConns(1)
	write.SetConnMaxLifetime(0)
	write.SetConnMaxIdleTime(0)
	// The writer connects first: it creates the file and switches it to WAL,
	// which read connections then find in place.
	if err := write.PingContext(ctx); err != nil {
		write.Close()
		return nil, fmt.Errorf("open sqlite store %s: %w: %w", path, store.ErrUnavailable, err)
	}

	rq := url.Values{"_busy_timeout": {busy}, "_query_only": {"1"}}
	read, err := sql.Open("sqlite", path+"?"+rq.Encode())
	if err != nil {
		write.Close()
		return nil, fmt.Errorf("open sqlite store %s: %w", path, err)
	}
	read.SetMaxOpenConns(opts.ReadConns)
	read.SetMaxIdleConns(opts.ReadConns)
	if err := read.PingContext(ctx); err != nil {
		return nil, errors.Join(fmt.Errorf("open sqlite store %s: %w: %w", path, store.ErrUnavailable, err), read.Close(), write.Close())
	}
	return &Store{
		write:    write,
		read:     read,
		modelIDs: map[string]int64{},
		leases:   map[string]*lease{},
	}, nil
}

// Close releases every lease and closes the database.
func (s *Store) Close() error {
	s.mu.Lock()
	s.closed = true
	clear(s.leases)
	s.mu.Unlock()
	var errs []error
	s.stmtMu.Lock()
	for _, st := range s.stmts {
		errs = append(errs, st.Close())
	}
	s.stmts = nil
	s.stmtMu.Unlock()
	return errors.Join(append(errs, s.read.Close(), s.write.Close())...)
}

// ingestQueries are the statements of the ingest path. They are prepared
// once on the writer connection and reused by every transaction: preparing
// them per batch would cost more than the inserts of a one-line batch.
func ingestQueries() []string {
	qs := []string{
		sqlInsertPrediction, sqlPredictionContent, sqlHasEarly, sqlEarlyFor, sqlDeleteEarlyFor,
		sqlPredictionLabel, sqlInsertEarly, sqlInsertVersion, sqlSetLabel,
		sqlAddCell, sqlAddPredicted, sqlModelTotals, sqlAddScore, sqlAddScoreLabel,
	}
	for _, rows := range insertChunks() {
		qs = append(qs, insertPredictionsSQL(rows))
	}
	for _, rows := range append(insertChunks(), 1) {
		qs = append(qs, lookupLabelsSQL(rows), insertVersionsSQL(rows), setLabelsSQL(rows))
	}
	return qs
}

// ingestTx is a write transaction that runs the prepared ingest statements.
type ingestTx struct {
	*sql.Tx
	stmts map[string]*sql.Stmt
}

// stmt returns the prepared statement of query bound to the transaction;
// it closes with the transaction.
func (tx *ingestTx) stmt(ctx context.Context, query string) *sql.Stmt {
	return tx.StmtContext(ctx, tx.stmts[query])
}

// beginIngest prepares the ingest statements if this is the first ingest,
// then begins a write transaction. The statements are prepared outside the
// transaction, which holds the writer's only connection.
func (s *Store) beginIngest(ctx context.Context, op string) (*ingestTx, error) {
	s.stmtMu.Lock()
	if s.stmts == nil {
		stmts := map[string]*sql.Stmt{}
		for _, q := range ingestQueries() {
			st, err := s.write.PrepareContext(ctx, q)
			if err != nil {
				for _, prepared := range stmts {
					prepared.Close()
				}
				s.stmtMu.Unlock()
				return nil, unavailable("prepare ingest statement", err)
			}
			stmts[q] = st
		}
		s.stmts = stmts
	}
	stmts := s.stmts
	s.stmtMu.Unlock()
	tx, err := s.write.BeginTx(ctx, nil)
	if err != nil {
		return nil, unavailable(op, err)
	}
	return &ingestTx{Tx: tx, stmts: stmts}, nil
}

// unavailable wraps a database failure so callers can tell it from bad
// input with errors.Is(err, store.ErrUnavailable).
func unavailable(op string, err error) error {
	return fmt.Errorf("%s: %w: %w", op, store.ErrUnavailable, err)
}

// queryRower is the part of *sql.DB and *sql.Tx that modelID needs.
type queryRower interface {
	QueryRowContext(ctx context.Context, query string, args ...any) *sql.Row
}

// modelID returns the id of a registered model, from the cache or from q.
// An unregistered model gives store.ErrUnknownModel.
func (s *Store) modelID(ctx context.Context, q queryRower, name string) (int64, error) {
	s.mu.Lock()
	id, ok := s.modelIDs[name]
	s.mu.Unlock()
	if ok {
		return id, nil
	}
	err := q.QueryRowContext(ctx, sqlModelID, name).Scan(&id)
	if errors.Is(err, sql.ErrNoRows) {
		return 0, fmt.Errorf("model %q: %w", name, store.ErrUnknownModel)
	}
	if err != nil {
		return 0, unavailable("look up model", err)
	}
	s.mu.Lock()
	s.modelIDs[name] = id
	s.mu.Unlock()
	return id, nil
}

// micros encodes a time as stored: Unix microseconds.
func micros(t time.Time) int64 { return t.UnixMicro() }

// fromMicros decodes a stored time.
func fromMicros(us int64) time.Time { return time.UnixMicro(us).UTC() }

// affected returns the rows an Exec changed.
func affected(r sql.Result, err error) (int64, error) {
	if err != nil {
		return 0, err
	}
	return r.RowsAffected()
}
