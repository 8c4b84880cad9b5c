package pgstore

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/classwatch/classwatch/migrations"
	"github.com/classwatch/classwatch/windows/store"
)

var _ store.Store = (*Store)(nil)

// Options tune an opened Store. The zero value uses the URL as given.
type Options struct {
	// Schema, when set, is the schema holding the store's tables: it becomes
	// the connections' search_path and Migrate creates it if missing. Tests
	// use it to give each test a schema of its own.
	Schema string
	// MaxConns caps the connection pool; 0 keeps pgxpool's default
	// (the greater of 4 and the number of CPUs) or the URL's pool_max_conns.
	MaxConns int32
}

// Store is the PostgreSQL store. It is safe for concurrent use by multiple
// goroutines and by several processes sharing one database.
type Store struct {
	pool   *pgxpool.Pool
	schema string // Options.Schema

	// Advisory lock keys, derived from the search path so that stores in
	// different schemas of one database do not block each other.
	keys lockKeys

	mu     sync.Mutex
	models map[string]int32    // registered models; a model is never deleted
	days   map[modelDay]bool   // (model, day) partitions known to exist
	leases map[*lease]struct{} // held TryLead locks
	closed bool
}

// lockKeys are the first halves of the two-key advisory locks (the second
// half is a model id, or 0) and the salt of TryLead's one-key locks.
type lockKeys struct {
	migrate, ddl, label, early int32
	lead                       string
}

// maxAttempts bounds the retries of a transaction that failed on a
// deadlock, a serialization failure or a lost insert race.
const maxAttempts = 6

// Open creates a connection pool for url (a PostgreSQL URL or keyword/value
// string) and returns a Store using it. It does not connect or migrate:
// call Migrate (or Ping) before use. Close closes the pool.
func Open(ctx context.Context, url string, opts Options) (*Store, error) {
	cfg, err := pgxpool.ParseConfig(url)
	if err != nil {
		return nil, fmt.Errorf("open postgres store: %w", err)
	}
	if opts.MaxConns > 0 {
		cfg.MaxConns = opts.MaxConns
	}
	rp := cfg.ConnConfig.RuntimeParams
	if opts.Schema != "" {
		rp["search_path"] = pgx.Identifier{opts.Schema}.Sanitize()
	}
	// Times are compared and truncated to days in UTC. Every statement is
	// planned with its parameter values, so that a bucket range prunes the
	// partitioned tables at plan time and a statement locks only the days it
	// reads instead of every partition.
	rp["timezone"] = "UTC"
	rp["plan_cache_mode"] = "force_custom_plan"
	cfg.AfterConnect = func(_ context.Context, c *pgx.Conn) error {
		c.TypeMap().RegisterType(&pgtype.Type{
			Name: "timestamptz", OID: pgtype.TimestamptzOID,
			Codec: &pgtype.TimestamptzCodec{ScanLocation: time.UTC},
		})
		return nil
	}
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return nil, fmt.Errorf("open postgres store: %w", err)
	}
	return &Store{
		pool:   pool,
		schema: opts.Schema,
		keys:   newLockKeys(rp["search_path"]),
		models: map[string]int32{},
		days:   map[modelDay]bool{},
		leases: map[*lease]struct{}{},
	}, nil
}

func newLockKeys(searchPath string) lockKeys {
	key := func(kind string) int32 {
		h := fnv.New32a()
		h.Write([]byte("classwatch\x00" + kind + "\x00" + searchPath))
		return int32(h.Sum32())
	}
	return lockKeys{
		migrate: key("migrate"),
		ddl:     key("ddl"),
		label:   key("label"),
		early:   key("early"),
		lead:    "classwatch\x00lead\x00" + searchPath + "\x00",
	}
}

// Close releases every held lease and closes the pool.
func (s *Store) Close() error {
	s.mu.Lock()
	s.closed = true
	held := make([]*lease, 0, len(s.leases))
	for l := range s.leases {
		held = append(held, l)
	}
	s.mu.Unlock()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	var errs []error
	for _, l := range held {
		errs = append(errs, l.Release(ctx))
	}
	s.pool.Close()
	return errors.Join(errs...)
}

// Ping checks that the database answers and carries this binary's schema.
func (s *Store) Ping(ctx context.Context) error {
	latest, err := migrations.Latest(migrations.Postgres)
	if err != nil {
		return err
	}
	var current int
	err = s.pool.QueryRow(ctx, sqlSchemaVersion).Scan(&current)
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) && pgErr.Code == "42P01" {
		return fmt.Errorf("ping postgres store: %w", errNotMigrated)
	}
	if err != nil {
		return unavailable("ping postgres store", err)
	}
	if current != latest {
		return fmt.Errorf("ping postgres store: schema version %d, this binary needs %d", current, latest)
	}
	return nil
}

// errNotMigrated is returned by Ping for a database without classwatch's
// schema.
var errNotMigrated = errors.New("database is not migrated")

// errBadInput marks errors caused by the caller's data, which must not be
// reported as store.ErrUnavailable.
var errBadInput = errors.New("bad input")

// unavailable wraps a database failure with store.ErrUnavailable, so
// callers can tell it from bad input. Errors about the input pass through.
func unavailable(op string, err error) error {
	if errors.Is(err, store.ErrUnknownModel) || errors.Is(err, store.ErrTooManyClasses) || errors.Is(err, errBadInput) ||
		errors.Is(err, store.ErrLimit) {
		return err
	}
	return fmt.Errorf("%s: %w: %w", op, store.ErrUnavailable, err)
}

// retry runs attempt until it succeeds, fails for good, or maxAttempts
// have failed on transient errors. attempt must start from scratch: a
// failed attempt's transaction was rolled back.
func (s *Store) retry(ctx context.Context, attempt func() error) error {
	var err error
	for i := range maxAttempts {
		if err = attempt(); err == nil || !s.transient(err) {
			return err
		}
		wait := time.Duration(i+1) * time.Duration(5+rand.IntN(20)) * time.Millisecond
		select {
		case <-ctx.Done():
			return errors.Join(err, ctx.Err())
		case <-time.After(wait):
		}
	}
	return err
}

// transient reports whether a fresh attempt may succeed: deadlocks and
// serialization failures, an insert that lost a race to a concurrent
// transaction (which then committed the same key), and a day partition
// dropped by a concurrent purge (after which the partition cache is
// forgotten, so the next attempt recreates what it needs).
func (s *Store) transient(err error) bool {
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) {
		return false
	}
	switch pgErr.Code {
	case "40001", "40P01", "23505":
		return true
	case "23514", "42P01":
		if pgErr.Code == "23514" && !strings.Contains(pgErr.Message, "no partition") {
			return false
		}
		s.mu.Lock()
		clear(s.days)
		s.mu.Unlock()
		return true
	}
	return false
}

// conn is what the transaction helpers need of a connection or pgx.Tx.
type conn interface {
	Exec(ctx context.Context, sql string, args ...any) (pgconn.CommandTag, error)
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
	SendBatch(ctx context.Context, b *pgx.Batch) pgx.BatchResults
	CopyFrom(ctx context.Context, table pgx.Identifier, columns []string, src pgx.CopyFromSource) (int64, error)
}

// Statements that open and close the ingest transactions of inTx.
const (
	sqlBegin    = `BEGIN`
	sqlCommit   = `COMMIT`
	sqlRollback = `ROLLBACK`
)

// inTx runs fn in a transaction on one pooled connection. fn opens it by
// queuing sqlBegin first in its first batch and commits by queuing
// sqlCommit last in its last one, so the transaction costs no round trips
// of its own: on a busy machine every round trip waits for a CPU, and the
// ingest paths are a handful of round trips each. If fn fails, or returns
// with the transaction still open, inTx rolls it back; should that fail
// too, the pool discards the connection, which ends the transaction.
func (s *Store) inTx(ctx context.Context, fn func(c *pgx.Conn) error) error {
	pc, err := s.pool.Acquire(ctx)
	if err != nil {
		return err
	}
	defer pc.Release()
	c := pc.Conn()
	err = fn(c)
	if c.PgConn().TxStatus() != 'I' && !c.IsClosed() {
		_, _ = c.Exec(context.WithoutCancel(ctx), sqlRollback)
		if err == nil {
			err = errors.New("transaction left open")
		}
	}
	return err
}

// summarize brings the BRIN index of predictions up to date, so the bucket
// ranges PurgeRaw and ApplyLabelTimeout read skip the blocks of other
// buckets; autovacuum does it too, when it runs. It is an optimization: a
// role that may not summarize (42501) is not an error.
func (s *Store) summarize(ctx context.Context) error {
	_, err := s.pool.Exec(ctx, sqlSummarize)
	var pgErr *pgconn.PgError
	if err == nil || (errors.As(err, &pgErr) && pgErr.Code == "42501") {
		return nil
	}
	return unavailable("summarize bucket index", err)
}

// modelIDs resolves model names to ids, from the cache or the database. An
// unregistered model gives store.ErrUnknownModel.
func (s *Store) modelIDs(ctx context.Context, names []string) (map[string]int32, error) {
	out := make(map[string]int32, 1)
	var miss []string
	s.mu.Lock()
	for _, n := range names {
		if _, done := out[n]; done {
			continue
		}
		if id, ok := s.models[n]; ok {
			out[n] = id
		} else if !slices.Contains(miss, n) {
			miss = append(miss, n)
		}
	}
	s.mu.Unlock()
	if len(miss) == 0 {
		return out, nil
	}
	rows, err := s.pool.Query(ctx, sqlModelIDs, miss)
	if err != nil {
		return nil, unavailable("look up models", err)
	}
	found := map[string]int32{}
	var (
		name string
		id   int32
	)
	_, err = pgx.ForEachRow(rows, []any{&name, &id}, func() error {
		found[name] = id
		return nil
	})
	if err != nil {
		return nil, unavailable("look up models", err)
	}
	for _, n := range miss {
		id, ok := found[n]
		if !ok {
			return nil, fmt.Errorf("model %q: %w", n, store.ErrUnknownModel)
		}
		out[n] = id
	}
	s.mu.Lock()
	for n, id := range found {
		s.models[n] = id
	}
	s.mu.Unlock()
	return out, nil
}

// modelID resolves one model name.
func (s *Store) modelID(ctx context.Context, name string) (int32, error) {
	ids, err := s.modelIDs(ctx, []string{name})
	if err != nil {
		return 0, err
	}
	return ids[name], nil
}

// micro truncates t to PostgreSQL's resolution (microseconds) in UTC, so
// that comparisons in Go and in the database agree.
func micro(t time.Time) time.Time { return t.Truncate(time.Microsecond).UTC() }

// sortedModels returns the distinct model ids of ids in ascending order:
// advisory locks on several models are always taken in this order.
func sortedModels(ids map[string]int32) []int32 {
	out := make([]int32, 0, len(ids))
	for _, id := range ids {
		out = append(out, id)
	}
	return distinctSorted(out)
}

// distinctSorted sorts ids and drops repeats, in place.
func distinctSorted(ids []int32) []int32 {
	slices.Sort(ids)
	return slices.Compact(ids)
}
