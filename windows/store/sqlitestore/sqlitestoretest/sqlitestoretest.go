// Package sqlitestoretest opens SQLite stores for tests of the packages
// that run on sqlitestore, as pgstoretest does for PostgreSQL.
package sqlitestoretest

import (
	"context"
	"path/filepath"
	"testing"

	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// Open opens a migrated store with opts on a new file under tb.TempDir()
// and closes it when the test ends.
func Open(tb testing.TB, opts sqlitestore.Options) *sqlitestore.Store {
	tb.Helper()
	return OpenAt(tb, filepath.Join(tb.TempDir(), "classwatch.db"), opts)
}

// OpenAt is Open on the file at path, new or not: a test reopens a file
// to see what a restarted daemon sees.
func OpenAt(tb testing.TB, path string, opts sqlitestore.Options) *sqlitestore.Store {
	tb.Helper()
	ctx := context.Background()
	st, err := sqlitestore.Open(ctx, path, opts)
	if err != nil {
		tb.Fatalf("open sqlite store: %v", err)
	}
	tb.Cleanup(func() { st.Close() })
	if err := st.Migrate(ctx); err != nil {
		tb.Fatalf("migrate: %v", err)
	}
	return st
}
